//! Telling systemd about the daemon's state (Type=notify), when it is listening.

/// Tell systemd (Type=notify) about our state, when it is listening.
pub(super) fn sd_notify(state: &str) {
    let Some(socket) = std::env::var_os("NOTIFY_SOCKET") else {
        return;
    };
    let Ok(sock) = std::os::unix::net::UnixDatagram::unbound() else {
        return;
    };
    let name = socket.to_string_lossy().into_owned();
    let sent = if let Some(abstract_name) = name.strip_prefix('@') {
        #[cfg(target_os = "linux")]
        {
            use std::os::linux::net::SocketAddrExt;
            std::os::unix::net::SocketAddr::from_abstract_name(abstract_name.as_bytes())
                .and_then(|addr| sock.send_to_addr(state.as_bytes(), &addr))
        }
        #[cfg(not(target_os = "linux"))]
        {
            let _ = abstract_name;
            Ok(0)
        }
    } else {
        sock.send_to(state.as_bytes(), &name)
    };
    if let Err(e) = sent {
        tracing::debug!("sd_notify {state}: {e}");
    }
}
