//! plumb-checks
