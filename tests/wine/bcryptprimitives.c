/* A test fixture for Wine only, never shipped: Wine 8.0 lacks bcryptprimitives.dll,
 * whose ProcessPrng Rust's standard library calls for random numbers since Rust 1.78.
 * This stand-in fills the buffer from advapi32's RtlGenRandom (SystemFunction036). */
#include <windows.h>

BOOLEAN WINAPI SystemFunction036(PVOID buffer, ULONG length);

BOOL WINAPI ProcessPrng(PBYTE data, SIZE_T length)
{
    while (length > 0) {
        ULONG chunk = length > 0x10000000 ? 0x10000000 : (ULONG)length;
        if (!SystemFunction036(data, chunk))
            return FALSE;
        data += chunk;
        length -= chunk;
    }
    return TRUE;
}
