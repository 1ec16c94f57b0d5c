//! One module per subcommand: an `Args` struct and a `run`.

pub mod fit;
pub mod inspect;
pub mod replay;
