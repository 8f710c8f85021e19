//! One file per subcommand: its arguments, and a `run` that calls the library.

pub mod admit;
pub mod audit;
pub mod check;
pub mod demo;
pub mod drift;
pub mod history;
pub mod hosts;
pub mod inspect;
pub mod pack;
pub mod publish;
pub mod replay;
pub mod restore;
pub mod revise;
pub mod score;
pub mod serve;
pub mod show;
pub mod status;
pub mod stream;
pub mod usage;
pub mod vouch;
pub mod voucher;
pub mod withdraw;
pub mod work;
