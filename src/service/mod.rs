//! Running as a service: the long-running pipeline and the service manager's protocol.

pub mod daemon;
pub mod notify;
