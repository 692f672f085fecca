//! Settings
