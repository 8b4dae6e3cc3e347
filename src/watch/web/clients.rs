//! The status page's bookkeeping per client: the connections it holds, its failed
//! sign-ins (and how long its next attempt waits), and whether each was said in the log
//! in the current window. A client is an IPv4 address or an IPv6 /64 prefix (one
//! network's share: a host given a /64 can pick any address in it, so counting
//! addresses would count nothing). Pure: the time is an argument; the server keeps one
//! table behind a mutex. Bounded: connections are counted only while open (at most the
//! server's own connection limit), and at most `REMEMBERED` clients are remembered,
//! the stalest forgotten first.

use std::collections::HashMap;
use std::net::{IpAddr, Ipv6Addr};
use std::time::Duration;

/// Connections one client may hold at once. A browser opens up to six to one server
/// (common practice of current browsers); a seventh and eighth leave room for a script
/// beside it.
pub const PER_CLIENT: usize = 8;
/// Failed sign-ins and refused connections are counted, and said once, per window.
pub const WINDOW_S: f64 = 600.0;
/// Failed sign-ins in a window before a client's attempts are slowed: room for typing
/// errors.
pub const FREE_FAILURES: u32 = 5;
/// The longest an attempt with a token waits: each failure beyond the free ones doubles
/// the wait, from 1 s. With `PER_CLIENT` connections each waiting this long, a client
/// tries at most one token a second.
pub const MAX_WAIT_S: f64 = 8.0;
/// Clients remembered for their failures and what was said about them.
pub const REMEMBERED: usize = 1024;

/// One client, as connections and failures are counted.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub struct Client(IpAddr);

impl Client {
    /// The client a connection's peer address belongs to.
    pub fn of(ip: IpAddr) -> Client {
        match ip {
            IpAddr::V4(v4) => Client(IpAddr::V4(v4)),
            IpAddr::V6(v6) => match v6.to_ipv4_mapped() {
                Some(v4) => Client(IpAddr::V4(v4)),
                None => {
                    let s = v6.segments();
                    Client(IpAddr::V6(Ipv6Addr::new(
                        s[0], s[1], s[2], s[3], 0, 0, 0, 0,
                    )))
                }
            },
        }
    }
}

impl std::fmt::Display for Client {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self.0 {
            IpAddr::V4(v4) => write!(f, "{v4}"),
            IpAddr::V6(v6) => write!(f, "{v6}/64"),
        }
    }
}

/// What is remembered of a client between its connections.
#[derive(Debug, Clone, Copy)]
struct Remembered {
    /// When the current window began.
    since: f64,
    /// When anything was last noted, for forgetting the stalest first.
    last: f64,
    failures: u32,
    said_failures: bool,
    said_crowding: bool,
}

/// Every client's count of connections and what is remembered of it.
#[derive(Debug, Default)]
pub struct Clients {
    held: HashMap<Client, usize>,
    remembered: HashMap<Client, Remembered>,
}

impl Clients {
    /// A new connection from `c`: `Ok` when it may stay (then [`Clients::close`] it when
    /// it ends), `Err(say)` when the client holds `PER_CLIENT` already, `say` being
    /// whether this is the first refusal of its window.
    pub fn open(&mut self, c: Client, now: f64) -> Result<(), bool> {
        let held = self.held.entry(c).or_insert(0);
        if *held < PER_CLIENT {
            *held += 1;
            return Ok(());
        }
        let r = self.remember(c, now);
        let say = !r.said_crowding;
        r.said_crowding = true;
        Err(say)
    }

    /// A connection `open` let in has ended.
    pub fn close(&mut self, c: Client) {
        if let Some(n) = self.held.get_mut(&c) {
            *n = n.saturating_sub(1);
            if *n == 0 {
                self.held.remove(&c);
            }
        }
    }

    /// Connections `c` holds now.
    #[cfg(test)]
    pub fn held(&self, c: Client) -> usize {
        self.held.get(&c).copied().unwrap_or(0)
    }

    /// How long a request of `c` that carries a token waits before it is looked at:
    /// nothing for the first `FREE_FAILURES` failures of a window, then 1 s doubling up
    /// to `MAX_WAIT_S`.
    pub fn wait(&self, c: Client, now: f64) -> Duration {
        let failures = match self.remembered.get(&c) {
            Some(r) if now - r.since <= WINDOW_S => r.failures,
            _ => 0,
        };
        if failures < FREE_FAILURES {
            return Duration::ZERO;
        }
        let doublings = (failures - FREE_FAILURES).min(16);
        Duration::from_secs_f64(f64::from(1u32 << doublings).min(MAX_WAIT_S))
    }

    /// A failed sign-in of `c`: the failures of its window when this one should be said
    /// in the log (the first that slows it), `None` otherwise.
    pub fn failed(&mut self, c: Client, now: f64) -> Option<u32> {
        let r = self.remember(c, now);
        r.failures = r.failures.saturating_add(1);
        if r.failures >= FREE_FAILURES && !r.said_failures {
            r.said_failures = true;
            return Some(r.failures);
        }
        None
    }

    /// Clients remembered (for the bound's test).
    #[cfg(test)]
    pub fn remembered(&self) -> usize {
        self.remembered.len()
    }

    /// The client's entry, its window begun again when it ran out; a full table first
    /// forgets clients whose window ran out, then the one noted longest ago.
    fn remember(&mut self, c: Client, now: f64) -> &mut Remembered {
        if !self.remembered.contains_key(&c) && self.remembered.len() >= REMEMBERED {
            self.remembered.retain(|_, r| now - r.since <= WINDOW_S);
            if self.remembered.len() >= REMEMBERED {
                let stalest = self
                    .remembered
                    .iter()
                    .min_by(|a, b| a.1.last.total_cmp(&b.1.last))
                    .map(|(k, _)| *k);
                if let Some(k) = stalest {
                    self.remembered.remove(&k);
                }
            }
        }
        let fresh = Remembered {
            since: now,
            last: now,
            failures: 0,
            said_failures: false,
            said_crowding: false,
        };
        let r = self.remembered.entry(c).or_insert(fresh);
        if now - r.since > WINDOW_S {
            *r = fresh;
        }
        r.last = now;
        r
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn v4(s: &str) -> Client {
        Client::of(s.parse().unwrap())
    }

    #[test]
    fn a_client_is_an_ipv4_address_or_an_ipv6_network() {
        assert_eq!(v4("192.0.2.7").to_string(), "192.0.2.7");
        // The IPv4-mapped form (RFC 4291 §2.5.5.2) is the IPv4 client itself.
        assert_eq!(v4("::ffff:192.0.2.7"), v4("192.0.2.7"));
        // Two hosts of one /64 (RFC 4291 §2.5.4: the interface identifier is the low
        // 64 bits) are one client; another /64 is another.
        assert_eq!(v4("2001:db8:1:2::1"), v4("2001:db8:1:2:ffff::9"));
        assert_ne!(v4("2001:db8:1:2::1"), v4("2001:db8:1:3::1"));
        assert_eq!(v4("2001:db8:1:2::1").to_string(), "2001:db8:1:2::/64");
    }

    #[test]
    fn one_client_holds_at_most_its_share_and_others_are_let_in() {
        let mut t = Clients::default();
        let (a, b) = (v4("192.0.2.1"), v4("192.0.2.2"));
        for _ in 0..PER_CLIENT {
            assert_eq!(t.open(a, 0.0), Ok(()));
        }
        // Said once per window, however many are refused.
        assert_eq!(t.open(a, 1.0), Err(true));
        assert_eq!(t.open(a, 2.0), Err(false));
        assert_eq!(t.open(b, 2.0), Ok(()));
        t.close(a);
        assert_eq!(t.open(a, 3.0), Ok(()));
        assert_eq!(t.held(a), PER_CLIENT);
        assert_eq!(t.open(a, 3.0 + WINDOW_S + 1.0), Err(true));
        for _ in 0..PER_CLIENT {
            t.close(a);
        }
        t.close(a);
        assert_eq!(t.held(a), 0);
    }

    #[test]
    fn failed_sign_ins_are_said_once_and_slow_the_client_down() {
        let mut t = Clients::default();
        let (a, b) = (v4("192.0.2.1"), v4("192.0.2.2"));
        let mut said = Vec::new();
        let mut waits = Vec::new();
        for k in 0..9 {
            waits.push(t.wait(a, k as f64).as_secs_f64());
            said.extend(t.failed(a, k as f64));
        }
        assert_eq!(said, vec![FREE_FAILURES]);
        assert_eq!(waits, [0.0, 0.0, 0.0, 0.0, 0.0, 1.0, 2.0, 4.0, 8.0]);
        assert_eq!(t.wait(a, 10.0).as_secs_f64(), MAX_WAIT_S);
        // Another client is not slowed by it.
        assert_eq!(t.wait(b, 10.0), Duration::ZERO);
        // A new window starts afresh, and is said again when it fills.
        let later = 8.0 + WINDOW_S + 1.0;
        assert_eq!(t.wait(a, later), Duration::ZERO);
        let again: Vec<u32> = (0..FREE_FAILURES)
            .filter_map(|k| t.failed(a, later + f64::from(k)))
            .collect();
        assert_eq!(again, vec![FREE_FAILURES]);
    }

    #[test]
    fn the_table_of_clients_stays_bounded() {
        let mut t = Clients::default();
        for k in 0..(3 * REMEMBERED as u32) {
            let c = Client::of(IpAddr::V4(std::net::Ipv4Addr::from(0x0a00_0000 + k)));
            t.failed(c, f64::from(k) * 1e-3);
            assert!(t.remembered() <= REMEMBERED);
        }
        // The newest client is the one kept, with its failure.
        let newest = Client::of(IpAddr::V4(std::net::Ipv4Addr::from(
            0x0a00_0000 + 3 * REMEMBERED as u32 - 1,
        )));
        assert_eq!(t.remembered.get(&newest).map(|r| r.failures), Some(1));
    }
}
