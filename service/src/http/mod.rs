//! HTTP
