//! One file per subcommand: its arguments, and a `run` that calls the library.

pub mod audit;
pub mod check;
pub mod demo;
pub mod inspect;
pub mod keygen;
pub mod pack;
pub mod score;
pub mod serve;
pub mod sign;
pub mod status;
pub mod stream;
pub mod usage;
pub mod verify;
