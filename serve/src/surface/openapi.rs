//! The OpenAPI 3.1 document of the HTTP surface, generated from the
//! handlers' annotations and the wire types (utoipa), so it cannot drift
//! from what the server sends and accepts.
//!
//! The committed copy, `serve/src/surface/openapi.json`, is what clients and
//! schemathesis read; a test fails when it differs from [`document`]
//! (`PADDOCK_WRITE_OPENAPI=1 cargo test -p paddock-serve --lib openapi`
//! rewrites it).
//!
//! Most schemas are derived on the types themselves. The few types whose
//! JSON is written by hand describe themselves with
//! [`paddock_host::described!`]: a row, a feature value and a digest in
//! `paddock_host::openapi`, one row's estimates here; the contract, whose types come from
//! the WIT file, is described by [`ContractDoc`], which a test holds to the
//! contract's real serialised form.

use serde::{Deserialize, Serialize};
use utoipa::openapi::schema::{AdditionalProperties, ObjectBuilder, SchemaType, Type};
use utoipa::openapi::security::{Http, HttpAuthScheme, SecurityScheme};
use utoipa::{Modify, OpenApi, ToSchema};

use super::http;
use super::wire::{
    ErrorBody, ErrorDetail, Estimate, EstimateAnswer, EstimateRequest, OutputContributions, RowContributions,
};
use crate::registry::{
    ArtifactState, ArtifactStatus, GateStep, Reason, Refusal, RefusedFile, ReloadReport, RoutesState, Status,
};
use paddock_host::artifact::digest::Digest;
use paddock_host::sandbox::codecache::CodeSource;
use paddock_host::sandbox::model::Usage;
// utoipa takes a type spelled `Value` for serde_json's: name ours apart.
use paddock_host::artifact::trust::Admission;
use paddock_host::contract::rows::{ContractRule, Row, RowError, Value as FeatureValue};

#[derive(OpenApi)]
#[openapi(
    info(
        title = "paddock",
        description = "Estimates from sandboxed model versions served from a paddock store. Each answer names the version that produced it and what picked it. Rows are checked against the version's contract before the model sees them; every invalid row is reported with its feature, value and the rule it broke."
    ),
    servers((url = "http://127.0.0.1:7340", description = "the default listen address (loopback)")),
    paths(
        http::estimate,
        http::catalogue,
        http::contract,
        http::store,
        http::rescan,
        http::alive,
        http::ready,
        http::metrics_text,
        http::openapi
    ),
    components(schemas(
        EstimateRequest,
        EstimateAnswer,
        Estimate,
        RowContributions,
        OutputContributions,
        paddock_host::ContributionScale,
        Row,
        FeatureValue,
        Digest,
        Reason,
        RowError,
        ContractRule,
        Usage,
        ErrorBody,
        ErrorDetail,
        http::Catalogue,
        http::CatalogueEntry,
        http::Liveness,
        ContractDoc,
        Status,
        ArtifactStatus,
        ArtifactState,
        RoutesState,
        Refusal,
        GateStep,
        Admission,
        CodeSource,
        ReloadReport,
        RefusedFile
    )),
    modifiers(&BearerToken)
)]
struct Document;

/// The bearer token of the administrative route.
struct BearerToken;

impl Modify for BearerToken {
    fn modify(&self, openapi: &mut utoipa::openapi::OpenApi) {
        let components = openapi.components.get_or_insert_with(Default::default);
        components.add_security_scheme("bearer", SecurityScheme::Http(Http::new(HttpAuthScheme::Bearer)));
    }
}

/// The OpenAPI document, as pretty-printed JSON with a final newline.
pub fn document() -> String {
    let mut text = Document::openapi().to_pretty_json().unwrap_or_else(|e| format!("{{\"error\": \"{e}\"}}"));
    text.push('\n');
    text
}

fn object() -> ObjectBuilder {
    ObjectBuilder::new()
}

/// A request's `id`: any JSON value, echoed back.
pub(crate) fn request_id() -> utoipa::openapi::schema::Object {
    object()
        .schema_type(SchemaType::AnyValue)
        .description(Some("Any JSON value the caller wants echoed back with the answer."))
        .build()
}

/// A request's routing context.
pub(crate) fn context_map() -> utoipa::openapi::schema::Object {
    object()
        .schema_type(Type::Object)
        .additional_properties(Some(object().schema_type(Type::String)))
        .description(Some("Context for the routes: field → value (`region`, `site`…)."))
        .build()
}

/// An error's other facts.
pub(crate) fn details_map() -> utoipa::openapi::schema::Object {
    object()
        .schema_type(Type::Object)
        .additional_properties(Some(object().schema_type(SchemaType::AnyValue)))
        .description(Some("Other facts, by name (`served` for `unknown_model`, `loaded` for `unknown_version`)."))
        .build()
}

paddock_host::described!(
    Estimate,
    "Estimate",
    object()
        .schema_type(Type::Object)
        .description(Some("One row's estimates: output name → value, in the contract's output order."))
        .additional_properties(Some(AdditionalProperties::RefOr(object().schema_type(Type::Number).into())))
);

paddock_host::described!(
    RowContributions,
    "RowContributions",
    object()
        .schema_type(Type::Object)
        .description(Some("One row's contributions: output name → its contributions, in the contract's output order."))
        .additional_properties(Some(AdditionalProperties::RefOr(
            utoipa::openapi::Ref::from_schema_name("OutputContributions").into()
        )))
);

/// An output's contributions by feature.
pub(crate) fn by_feature() -> utoipa::openapi::schema::Object {
    object()
        .schema_type(Type::Object)
        .description(Some("Feature name → how much it moved the margin from the baseline, in contract order."))
        .additional_properties(Some(AdditionalProperties::RefOr(object().schema_type(Type::Number).into())))
        .build()
}

/// Bounds of a number: inclusive, `null` for an open side.
#[derive(Serialize, Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
#[schema(as = Bounds)]
pub struct BoundsDoc {
    /// The smallest value allowed.
    pub min: Option<f64>,
    /// The largest value allowed.
    pub max: Option<f64>,
}

/// What values a feature may take: `{"real": bounds}`, `{"whole": bounds}`,
/// `{"label": [labels]}` or `"flag"` — as manifests and `inspect` spell them.
#[derive(Serialize, Deserialize, ToSchema)]
#[serde(deny_unknown_fields, rename_all = "snake_case")]
#[schema(as = Domain)]
pub enum DomainDoc {
    /// Any finite real number within the bounds.
    Real(BoundsDoc),
    /// A whole number within the bounds.
    Whole(BoundsDoc),
    /// One of these labels.
    Label(Vec<String>),
    /// A yes/no value (a JSON boolean).
    Flag,
}

/// One input the model reads.
#[derive(Serialize, Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
#[schema(as = Feature)]
pub struct FeatureDoc {
    /// The name rows use.
    pub name: String,
    /// The values it may take.
    pub domain: DomainDoc,
    /// Unit of measure, if any.
    pub unit: Option<String>,
    /// Whether every row must carry it (an absent optional feature reaches
    /// the model as NaN).
    pub required: bool,
    /// What it means.
    pub about: String,
}

/// One value the model writes per row.
#[derive(Serialize, Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
#[schema(as = Output)]
pub struct OutputDoc {
    /// The output's name.
    pub name: String,
    /// Unit of measure, if any.
    pub unit: Option<String>,
    /// Values outside these are a model fault: never passed on.
    pub bounds: BoundsDoc,
    /// What it means.
    pub about: String,
}

/// A version's contract: what it reads and writes. Its JSON: what
/// `GET /contract` answers and `paddock inspect --json` prints.
#[derive(Serialize, Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
#[schema(as = Contract)]
pub struct ContractDoc {
    /// The model's name.
    pub name: String,
    /// The version (semver).
    pub version: String,
    /// Inputs, in row order.
    pub features: Vec<FeatureDoc>,
    /// Outputs, in order; never empty.
    pub outputs: Vec<OutputDoc>,
    /// What the model estimates and for whom.
    pub about: String,
}

impl From<&paddock_host::contract::Bounds> for BoundsDoc {
    fn from(b: &paddock_host::contract::Bounds) -> Self {
        BoundsDoc { min: b.min, max: b.max }
    }
}

impl From<&paddock_host::contract::Domain> for DomainDoc {
    fn from(d: &paddock_host::contract::Domain) -> Self {
        use paddock_host::contract::Domain;
        match d {
            Domain::Real(b) => DomainDoc::Real(b.into()),
            Domain::Whole(b) => DomainDoc::Whole(b.into()),
            Domain::Label(l) => DomainDoc::Label(l.clone()),
            Domain::Flag => DomainDoc::Flag,
        }
    }
}

impl From<&paddock_host::contract::Contract> for ContractDoc {
    fn from(c: &paddock_host::contract::Contract) -> Self {
        ContractDoc {
            name: c.name.clone(),
            version: c.version.clone(),
            features: c
                .features
                .iter()
                .map(|f| FeatureDoc {
                    name: f.name.clone(),
                    domain: (&f.domain).into(),
                    unit: f.unit.clone(),
                    required: f.required,
                    about: f.about.clone(),
                })
                .collect(),
            outputs: c
                .outputs
                .iter()
                .map(|o| OutputDoc {
                    name: o.name.clone(),
                    unit: o.unit.clone(),
                    bounds: (&o.bounds).into(),
                    about: o.about.clone(),
                })
                .collect(),
            about: c.about.clone(),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use paddock_host::contract::{Bounds, Contract, Domain, Feature, Output};

    /// The hand-described contract schema holds the contract's real JSON:
    /// every domain kind, open and closed bounds, units present and absent.
    #[test]
    fn the_contract_schema_reads_and_writes_the_contract_exactly() {
        let open = Bounds { min: None, max: None };
        let contract = Contract {
            name: "m".into(),
            version: "1.2.3".into(),
            features: vec![
                Feature {
                    name: "a".into(),
                    domain: Domain::Real(Bounds { min: Some(0.0), max: None }),
                    unit: Some("kW".into()),
                    required: true,
                    about: "x".into(),
                },
                Feature {
                    name: "b".into(),
                    domain: Domain::Whole(open),
                    unit: None,
                    required: false,
                    about: String::new(),
                },
                Feature {
                    name: "c".into(),
                    domain: Domain::Label(vec!["p".into(), "q".into()]),
                    unit: None,
                    required: true,
                    about: String::new(),
                },
                Feature { name: "d".into(), domain: Domain::Flag, unit: None, required: false, about: String::new() },
            ],
            outputs: vec![Output {
                name: "y".into(),
                unit: Some("min".into()),
                bounds: Bounds { min: Some(0.0), max: Some(1e3) },
                about: "y".into(),
            }],
            about: "test".into(),
        };
        let wire = serde_json::to_value(ContractDoc::from(&contract)).unwrap();
        let doc: ContractDoc = serde_json::from_value(wire.clone()).unwrap();
        assert_eq!(serde_json::to_value(&doc).unwrap(), wire);
        // Spelt as manifests spell domains (paddock_guest::DomainSpec).
        assert_eq!(wire["features"][0]["domain"], serde_json::json!({"real": {"min": 0.0, "max": null}}));
        assert_eq!(wire["features"][2]["domain"], serde_json::json!({"label": ["p", "q"]}));
        assert_eq!(wire["features"][3]["domain"], "flag");
        assert_eq!(wire["features"][1]["domain"], serde_json::json!({"whole": {"min": null, "max": null}}));
    }

    /// The committed document is exactly what the code generates.
    #[test]
    fn the_committed_document_is_the_generated_one() {
        let path = concat!(env!("CARGO_MANIFEST_DIR"), "/src/surface/openapi.json");
        let generated = document();
        if std::env::var_os("PADDOCK_WRITE_OPENAPI").is_some() {
            std::fs::write(path, &generated).unwrap();
        }
        let committed = std::fs::read_to_string(path).unwrap();
        assert!(
            committed == generated,
            "{path} differs from the generated document: run `PADDOCK_WRITE_OPENAPI=1 cargo test -p paddock-serve --lib openapi` and commit it"
        );
    }

    #[test]
    fn the_document_is_openapi_3_1_with_every_route() {
        let doc: serde_json::Value = serde_json::from_str(&document()).unwrap();
        assert_eq!(doc["openapi"], "3.1.0");
        let paths: Vec<&str> = doc["paths"].as_object().unwrap().keys().map(String::as_str).collect();
        assert_eq!(paths.len(), 9, "{paths:?}");
    }
}
