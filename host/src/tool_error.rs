//! An error reported by one of the WebAssembly tools paddock builds on
//! (wasmtime compiling or linking a component, wit-component making one),
//! with its whole chain of causes in the message. It has no `source()`:
//! the message already holds every cause, once.

use std::error::Error;
use std::fmt;

/// An error from wasmtime or wit-component, with its chain of causes.
#[derive(Debug)]
pub struct ToolError {
    message: String,
    original: Box<dyn Error + Send + Sync>,
}

impl ToolError {
    /// The error, with every cause it carries on one line.
    pub fn message(&self) -> &str {
        &self.message
    }

    /// The tool's own error, for a caller that wants to downcast it.
    pub fn original(&self) -> &(dyn Error + Send + Sync + 'static) {
        &*self.original
    }
}

impl fmt::Display for ToolError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(&self.message)
    }
}

impl Error for ToolError {}

impl From<wasmtime::Error> for ToolError {
    fn from(e: wasmtime::Error) -> Self {
        // `{:#}` writes the whole chain: "outer: cause: root cause".
        ToolError { message: format!("{e:#}"), original: e.into() }
    }
}

/// wit-parser and wit-component report `anyhow` errors (wasmtime re-exports
/// the crate, so paddock names it through wasmtime, never directly).
impl From<wasmtime::anyhow::Error> for ToolError {
    fn from(e: wasmtime::anyhow::Error) -> Self {
        ToolError { message: format!("{e:#}"), original: e.into() }
    }
}
