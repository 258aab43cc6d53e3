//! Exit codes shared by the binary.

/// Exit code for success.
pub const EXIT_OK: i32 = 0;
/// Exit code when `check` found problems or a command failed.
pub const EXIT_FAILURE: i32 = 1;
/// Exit code for bad command-line usage (clap's own).
pub const EXIT_USAGE: i32 = 2;

/// The one-line caution printed after a run and shown in reports.
pub const CAUTION: &str = "caution: inferred actions are estimates; validate any policy trained on them in simulation, then on hardware with speed and force limits and an emergency stop, under your lab's safety rules. Video of people is personal data: have consent and follow the data-protection law that applies to you.";
