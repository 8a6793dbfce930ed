//! The bounded hand-over from a source thread to analysis, with the two overload policies:
//! live sources keep only the newest frame, replay waits so that nothing is skipped.

use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::Arc;
use std::time::Duration;

use crossbeam_channel::{bounded, Receiver, SendTimeoutError, Sender, TrySendError};

use super::claim::Claim;
use super::config::Overload;
use crate::engine::Frame;

/// A frame, or why a frame could not be had (logged, then the daemon goes on), and the
/// claim on its file when it came from a watched folder: the file is disposed of once
/// the record is on disk.
pub struct Incoming {
    pub item: Result<Frame, FrameError>,
    pub claim: Option<Claim>,
}

#[derive(Clone, Debug)]
pub struct FrameError {
    pub origin: String,
    pub message: String,
}

/// Counters the source side keeps; the health records read them.
#[derive(Debug, Default)]
pub struct SourceCounters {
    /// Frames (and bad frames) the source produced.
    pub frames_in: AtomicU64,
    /// Frames replaced by a newer one before analysis took them.
    pub dropped: AtomicU64,
}

/// The sending half, owned by the source thread.
pub struct Feed {
    tx: Sender<Incoming>,
    /// Kept to evict the waiting frame when a newer one arrives.
    evict: Receiver<Incoming>,
    overload: Overload,
    pub counters: Arc<SourceCounters>,
    pub stop: Arc<AtomicBool>,
}

/// Makes a feed holding at most one waiting frame, and its receiving end.
pub fn feed(overload: Overload, counters: Arc<SourceCounters>, stop: Arc<AtomicBool>) -> (Feed, Receiver<Incoming>) {
    let (tx, rx) = bounded(1);
    (Feed { tx, evict: rx.clone(), overload, counters, stop }, rx)
}

impl Feed {
    pub fn stopped(&self) -> bool {
        self.stop.load(Ordering::Relaxed)
    }

    /// Hands an item over; false when the daemon is stopping or analysis has gone.
    pub fn send(&self, item: Result<Frame, FrameError>) -> bool {
        self.hand_over(Incoming { item, claim: None }, self.overload)
    }

    /// Hands over an item read from a claimed file, waiting until analysis takes it: a
    /// claimed file is never dropped (the folder itself is the queue).
    pub fn send_claimed(&self, item: Result<Frame, FrameError>, claim: Claim) -> bool {
        self.hand_over(Incoming { item, claim: Some(claim) }, Overload::Wait)
    }

    fn hand_over(&self, mut item: Incoming, overload: Overload) -> bool {
        self.counters.frames_in.fetch_add(1, Ordering::Relaxed);
        loop {
            if self.stopped() {
                return false;
            }
            match overload {
                Overload::Wait => match self.tx.send_timeout(item, Duration::from_millis(100)) {
                    Ok(()) => return true,
                    Err(SendTimeoutError::Timeout(i)) => item = i,
                    Err(SendTimeoutError::Disconnected(_)) => return false,
                },
                Overload::DropOldest => match self.tx.try_send(item) {
                    Ok(()) => return true,
                    Err(TrySendError::Full(i)) => {
                        if self.evict.try_recv().is_ok() {
                            self.counters.dropped.fetch_add(1, Ordering::Relaxed);
                        }
                        item = i;
                    }
                    Err(TrySendError::Disconnected(_)) => return false,
                },
            }
        }
    }

    /// Sleeps up to `d`, waking early when the daemon stops; false if it stopped.
    pub fn sleep(&self, d: Duration) -> bool {
        let step = Duration::from_millis(50);
        let mut left = d;
        while !left.is_zero() {
            if self.stopped() {
                return false;
            }
            let s = left.min(step);
            std::thread::sleep(s);
            left -= s;
        }
        !self.stopped()
    }
}
