//! Host-side bindings generated from `wit/estimator.wit`: the only source of
//! the contract types on this side.

#![allow(missing_docs)]

wasmtime::component::bindgen!({
    path: "../wit",
    world: "estimator",
    additional_derives: [serde::Serialize, serde::Deserialize, PartialEq],
});
