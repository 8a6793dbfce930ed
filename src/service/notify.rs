//! The service manager notification protocol, as systemd's sd_notify(3) describes it:
//! newline-separated `KEY=VALUE` assignments in one datagram to the Unix socket named
//! by `$NOTIFY_SOCKET` (a path, or an abstract name when it starts with `@`).

use std::os::unix::net::UnixDatagram;
use std::time::{Duration, Instant};

pub struct Notifier {
    socket: Option<(UnixDatagram, String)>,
    /// Half the watchdog period from `$WATCHDOG_USEC`, when the manager asked for pings.
    watchdog_every: Option<Duration>,
    last_ping: Option<Instant>,
}

impl Notifier {
    /// From the environment; without `$NOTIFY_SOCKET` every call does nothing.
    pub fn from_env() -> Self {
        let socket =
            std::env::var("NOTIFY_SOCKET").ok().filter(|s| !s.is_empty()).and_then(
                |addr| match UnixDatagram::unbound() {
                    Ok(s) => Some((s, addr)),
                    Err(e) => {
                        log::warn!("cannot create the notification socket: {e}");
                        None
                    }
                },
            );
        let pid_ok = std::env::var("WATCHDOG_PID")
            .ok()
            .and_then(|p| p.parse::<u32>().ok())
            .is_none_or(|p| p == std::process::id());
        let watchdog_every = std::env::var("WATCHDOG_USEC")
            .ok()
            .and_then(|u| u.parse::<u64>().ok())
            .filter(|&u| u > 0 && pid_ok)
            .map(|u| Duration::from_micros(u / 2));
        Self { socket, watchdog_every, last_ping: None }
    }

    pub fn send(&self, state: &str) {
        let Some((sock, addr)) = &self.socket else { return };
        let result = if let Some(name) = addr.strip_prefix('@') {
            use std::os::linux::net::SocketAddrExt;
            std::os::unix::net::SocketAddr::from_abstract_name(name.as_bytes())
                .and_then(|a| sock.send_to_addr(state.as_bytes(), &a))
        } else {
            sock.send_to(state.as_bytes(), addr)
        };
        if let Err(e) = result {
            log::warn!("service notification {state:?} to {addr} failed: {e}");
        }
    }

    pub fn ready(&self, status: &str) {
        self.send(&format!("READY=1\nSTATUS={status}"));
    }

    pub fn status(&self, status: &str) {
        self.send(&format!("STATUS={status}"));
    }

    pub fn stopping(&self) {
        self.send("STOPPING=1");
    }

    /// Pings the watchdog when half its period has passed since the last ping.
    pub fn watchdog(&mut self) {
        let Some(every) = self.watchdog_every else { return };
        if self.last_ping.is_none_or(|t| t.elapsed() >= every) {
            self.send("WATCHDOG=1");
            self.last_ping = Some(Instant::now());
        }
    }
}
