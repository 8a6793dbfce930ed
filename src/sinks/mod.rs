//! Where reports go: the detection log, evidence images, and health records.

pub mod evidence;
pub mod jsonl;
pub mod record;
pub mod worker;
