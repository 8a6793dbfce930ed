//! Contains a panic inside one unit of work (a frame's analysis, a decode, a record) so
//! that it becomes an error for that unit and the thread goes on. The panic hook still
//! prints the message and location to stderr; the caller gets the message.

use std::panic::{catch_unwind, AssertUnwindSafe};

/// Runs `work`; a panic becomes `Err` with the panic's message. The caller must not rely
/// on state `work` left half-changed (the engine keeps its cost model and settings
/// unchanged until a frame completes).
pub fn run<T>(work: impl FnOnce() -> T) -> Result<T, String> {
    catch_unwind(AssertUnwindSafe(work)).map_err(|payload| {
        payload
            .downcast_ref::<&str>()
            .map(|s| s.to_string())
            .or_else(|| payload.downcast_ref::<String>().cloned())
            .unwrap_or_else(|| "a panic without a message".into())
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_panic_becomes_its_message_and_a_value_passes_through() {
        assert_eq!(run(|| 7), Ok(7));
        assert_eq!(run(|| -> u8 { panic!("chunk size must be non-zero") }), Err("chunk size must be non-zero".into()));
        let n = 3;
        assert_eq!(run(|| -> u8 { panic!("frame {n}") }), Err("frame 3".into()));
    }
}
