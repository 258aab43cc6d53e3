//! The fit stage (in progress).

use serde::Serialize;

/// Resolved `[fit]` settings.
#[derive(Debug, Clone, Default, Serialize, PartialEq)]
pub struct FitOptions {}
