//! Object storage at the edges (placeholder; filled below).
