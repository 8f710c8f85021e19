//! One file per subcommand: its arguments, and a `run` that calls the library.

pub mod check;
pub mod demo;
pub mod inspect;
pub mod pack;
pub mod score;
