//! One module per subcommand: an `Args` struct and a `run`.

pub mod connect;
pub mod demo;
pub mod feed;
pub mod fit;
pub mod image;
pub mod inspect;
pub mod keygen;
pub mod listen;
pub mod replay;
pub mod report;
pub mod sign;
pub mod tailor;
pub mod upload;
