//! The serial endpoint: runs the detector, speaks the wire protocol, keeps model slots.
