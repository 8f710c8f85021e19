//! Host-side bindings generated from `wit/estimator.wit`: the only source of
//! the contract types on this side.

#![allow(missing_docs)]

wasmtime::component::bindgen!({
    path: "../wit",
    world: "estimator",
    additional_derives: [serde::Serialize, serde::Deserialize, PartialEq],
});

/// The `explaining-estimator` world of paddock:model 0.2.0: the host
/// uses its `contributions` export, when a component has it, and the
/// types that export returns. A component without it is an `estimator`
/// that cannot explain.
pub mod explaining {
    wasmtime::component::bindgen!({
        path: "../wit",
        world: "explaining-estimator",
    });
}
