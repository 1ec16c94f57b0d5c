//! plumb-scenario
