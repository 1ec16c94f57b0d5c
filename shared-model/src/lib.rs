//! plumb-model
