//! plumb-firmware
