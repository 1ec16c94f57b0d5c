//! plumb
