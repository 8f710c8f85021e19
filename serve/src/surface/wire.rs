//! The JSON shapes every surface shares: a request for estimates, its
//! answer, and an error body. The HTTP API's OpenAPI document is generated
//! from these types (`surface::openapi`, feature `http`).

use std::collections::BTreeMap;

use jiff::Timestamp;
use semver::Version;
use serde::ser::SerializeMap;
use serde::{Deserialize, Serialize, Serializer};

use crate::features::Fetched;
use crate::registry::{Answer, Lookups, Reason, Request, RequestContext, RequestError};
use paddock_host::artifact::digest::Digest;
use paddock_host::contract::rows::{Row, RowError};
use paddock_host::sandbox::explain::Explanation;
use paddock_host::sandbox::model::{ScoreError, Usage};

/// A request for estimates, in the same shape on every surface: the body of
/// `POST /estimate`, and one line of a stream.
#[derive(Clone, Debug, Deserialize)]
#[cfg_attr(feature = "http", derive(utoipa::ToSchema))]
#[serde(deny_unknown_fields)]
pub struct EstimateRequest {
    /// Any JSON value the caller wants echoed back in the answer.
    #[cfg_attr(feature = "http", schema(schema_with = super::openapi::request_id))]
    pub id: Option<serde_json::Value>,
    /// The model's name; the routes pick its version.
    pub model: String,
    /// One row: feature name → value (number, string label, boolean;
    /// `null` or left out for absent). Give `row` or `rows`, not both.
    pub row: Option<Row>,
    /// Rows, numbered from 1 in the order given.
    pub rows: Option<Vec<Row>>,
    /// Context for the routes: field → value (`region`, `site`…).
    #[serde(default)]
    #[cfg_attr(feature = "http", schema(schema_with = super::openapi::context_map))]
    pub context: RequestContext,
    /// When the request happened (RFC 3339 with an offset, e.g.
    /// `2026-12-05T08:27:00+01:00`), for time windows; the server's clock
    /// when left out.
    pub at: Option<String>,
    /// For a model whose features are looked up (the store's features
    /// file): `fallbacks` (the default) names in the answer only the
    /// features that fell back; `all` says where every one came from.
    /// The keys are the context's fields, or a row's own fields named as
    /// keys; a feature a row gives itself wins over its lookup.
    #[serde(default)]
    pub lookups: Lookups,
    /// `true` to have the answer carry each scored row's contributions:
    /// per output, the baseline and how much each feature moved the margin
    /// from it (they describe the model, not the world). Off by default;
    /// a model that cannot explain fails the request (`cannot_explain`).
    #[serde(default)]
    pub contributions: bool,
    /// What a host answered when it captured this request (a line of a
    /// capture file: the version, its outputs and each row's values); read
    /// by a replay, ignored when scoring.
    #[serde(default)]
    #[cfg_attr(feature = "http", schema(value_type = Option<Object>))]
    pub captured: Option<serde_json::Value>,
}

impl EstimateRequest {
    /// Takes the request's rows out (`row` or `rows`) and reads its time.
    ///
    /// # Errors
    /// An [`ErrorBody`] of kind `bad_request` when neither or both of `row`
    /// and `rows` are given, `rows` is empty, or `at` is not an RFC 3339
    /// time.
    pub fn take_rows(&mut self) -> Result<(Vec<Row>, Option<Timestamp>), ErrorBody> {
        let rows = match (self.row.take(), self.rows.take()) {
            (Some(row), None) => vec![row],
            (None, Some(rows)) if rows.is_empty() => {
                return Err(ErrorBody::bad_request("rows is empty: give at least one row"));
            }
            (None, Some(rows)) => rows,
            (Some(_), Some(_)) => return Err(ErrorBody::bad_request("give `row` or `rows`, not both")),
            (None, None) => return Err(ErrorBody::bad_request("give `row` (one row) or `rows` (a list)")),
        };
        Ok((rows, parse_at(self.at.as_deref())?))
    }

    /// The registry request for these rows.
    pub fn request<'a>(&'a self, rows: &'a [Row], at: Option<Timestamp>) -> Request<'a> {
        let mut request = Request::new(&self.model, &self.context, rows).at(at);
        if self.lookups == Lookups::All {
            request = request.every_lookup();
        }
        if self.contributions { request.with_contributions() } else { request }
    }
}

/// Parses an `at` field.
///
/// # Errors
/// An [`ErrorBody`] of kind `bad_request` naming the field and value.
pub fn parse_at(at: Option<&str>) -> Result<Option<Timestamp>, ErrorBody> {
    at.map(|t| {
        t.parse::<Timestamp>()
            .map_err(|e| ErrorBody::bad_request(format!("`at`: `{t}` is not an RFC 3339 time with an offset ({e})")))
    })
    .transpose()
}

/// The answer to a request for estimates.
#[derive(Clone, Debug, Serialize)]
#[cfg_attr(feature = "http", derive(utoipa::ToSchema))]
pub struct EstimateAnswer {
    /// The request's `id`, when it gave one.
    #[serde(skip_serializing_if = "Option::is_none")]
    #[cfg_attr(feature = "http", schema(schema_with = super::openapi::request_id))]
    pub id: Option<serde_json::Value>,
    /// The model.
    pub model: String,
    /// The version that answered (semver).
    #[cfg_attr(feature = "http", schema(value_type = String))]
    pub version: Version,
    /// Its artifact's digest.
    pub digest: Digest,
    /// The route that picked it: `default`, a rule's name, or `canary`.
    pub route: String,
    /// What picked it, in full.
    #[cfg_attr(feature = "http", schema(value_type = Reason))]
    pub reason: std::sync::Arc<Reason>,
    /// The registry generation the request was routed in.
    pub generation: u64,
    /// One entry per request row, in order: an object of output name →
    /// value (in contract order), or `null` when the row broke the contract
    /// (its problems are in `problems`).
    pub estimates: Vec<Option<Estimate>>,
    /// Every problem of the rows that got `null`, each naming its row
    /// (from 1), feature, value and rule. Empty when every row was valid.
    pub problems: Vec<RowError>,
    /// What the call cost.
    pub usage: Usage,
    /// Per request row, the features looked up for it: only those that
    /// fell back (missing or stale), or all of them when the request asked
    /// for `"lookups": "all"`. Left out when the model looks nothing up.
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub lookups: Vec<Vec<Fetched>>,
    /// When the request asked for them: per request row, in order, an
    /// object of output name → its contributions, or `null` for a row that
    /// broke the contract. Left out otherwise.
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub contributions: Vec<Option<RowContributions>>,
}

/// One row's contributions: output name → [`OutputContributions`], in
/// contract order.
pub type RowContributions = Named<OutputContributions>;

/// One output's contributions for one row.
#[derive(Clone, Debug, Serialize)]
#[cfg_attr(feature = "http", derive(utoipa::ToSchema))]
pub struct OutputContributions {
    /// What the margin is: `output` (no link), `log_odds`, `log` or
    /// `class_logit`.
    pub scale: paddock_host::ContributionScale,
    /// The model's expected margin over its training rows.
    pub baseline: f64,
    /// The row's margin: the baseline plus every feature's contribution.
    pub margin: f64,
    /// Feature name → how much it moved the margin, in contract order.
    #[cfg_attr(feature = "http", schema(schema_with = super::openapi::by_feature))]
    pub features: Named,
}

/// Names and their values, written as a JSON object in order.
#[derive(Clone, Debug)]
pub struct Named<T = f64> {
    names: std::sync::Arc<[String]>,
    values: Vec<T>,
}

impl<T: Serialize> Serialize for Named<T> {
    fn serialize<S: Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        let mut m = s.serialize_map(Some(self.values.len()))?;
        for (k, v) in self.names.iter().zip(&self.values) {
            m.serialize_entry(k, v)?;
        }
        m.end()
    }
}

/// One row's outputs: output name → value, in contract order.
pub type Estimate = Named;

impl EstimateAnswer {
    /// The wire form of an [`Answer`], echoing the request's `id`.
    pub fn new(answer: Answer, id: Option<serde_json::Value>) -> Self {
        let names = answer.outputs.clone();
        let estimates = answer
            .rows()
            .map(|row| row.map(|values| Named { names: names.clone(), values: values.to_vec() }))
            .collect();
        let contributions = answer.contributions.as_ref().map_or_else(Vec::new, |c| row_contributions(&answer, c));
        EstimateAnswer {
            id,
            model: answer.model,
            version: answer.version,
            digest: answer.digest,
            route: answer.reason.route().to_owned(),
            reason: answer.reason,
            generation: answer.generation,
            usage: *answer.estimates.usage(),
            estimates,
            problems: answer.problems,
            lookups: answer.lookups,
            contributions,
        }
    }
}

/// Per request row, its contributions, or `None` for a row not scored.
fn row_contributions(answer: &Answer, explained: &Explanation) -> Vec<Option<RowContributions>> {
    let features: std::sync::Arc<[String]> = explained.feature_names().into();
    let outputs: std::sync::Arc<[String]> = explained.output_names().into();
    let mut scored = answer.scored.iter().copied().enumerate().peekable();
    (1..=answer.requested)
        .map(|n| {
            let (k, _) = scored.next_if(|&(_, m)| m == n)?;
            let per_output = (0..outputs.len())
                .map(|o| {
                    let a = explained.of(k, o);
                    OutputContributions {
                        scale: explained.scale(o),
                        baseline: a.baseline,
                        margin: a.margin,
                        features: Named { names: features.clone(), values: a.features.to_vec() },
                    }
                })
                .collect();
            Some(Named { names: outputs.clone(), values: per_output })
        })
        .collect()
}

/// An error, as every surface reports it: `{"error": {...}}`.
#[derive(Clone, Debug, Serialize)]
#[cfg_attr(feature = "http", derive(utoipa::ToSchema))]
pub struct ErrorBody {
    /// The error.
    pub error: ErrorDetail,
}

/// What went wrong.
#[derive(Clone, Debug, Serialize)]
#[cfg_attr(feature = "http", derive(utoipa::ToSchema))]
pub struct ErrorDetail {
    /// A stable name: `bad_request`, `unknown_model`, `not_routed`, `unknown_version`,
    /// `invalid_rows`, `shape`, `too_many_rows`, `too_large`, `limit`,
    /// `trap`, `fault`, `output`, `start`, `contract_changed`, `not_loaded`,
    /// `cannot_explain`, `explanation_fault`,
    /// `overloaded`, `unauthorized`, `admin_disabled`, `not_ready`,
    /// `not_found`, `method_not_allowed`, `store`, `server`.
    pub kind: String,
    /// One line for people.
    pub message: String,
    /// The model, when one was named.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub model: Option<String>,
    /// The version the request was routed to.
    #[serde(skip_serializing_if = "Option::is_none")]
    #[cfg_attr(feature = "http", schema(value_type = Option<String>))]
    pub version: Option<Version>,
    /// The route that picked it.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub route: Option<String>,
    /// The limit hit, for `limit` and `too_many_rows`.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub limit: Option<String>,
    /// Every problem, for `invalid_rows` (no row was valid): row number
    /// (from 1), feature, value and the rule it broke.
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub rows: Vec<RowError>,
    /// Other facts, by name (models served, for `unknown_model`).
    #[serde(skip_serializing_if = "BTreeMap::is_empty")]
    #[cfg_attr(feature = "http", schema(schema_with = super::openapi::details_map))]
    pub details: BTreeMap<String, serde_json::Value>,
}

impl ErrorBody {
    /// An error of `kind` with a message and nothing else.
    pub fn new(kind: &str, message: impl Into<String>) -> Self {
        ErrorBody {
            error: ErrorDetail {
                kind: kind.into(),
                message: message.into(),
                model: None,
                version: None,
                route: None,
                limit: None,
                rows: Vec::new(),
                details: BTreeMap::new(),
            },
        }
    }

    /// A malformed request.
    pub fn bad_request(message: impl Into<String>) -> Self {
        Self::new("bad_request", message)
    }

    /// The wire form of a registry error.
    pub fn from_request(e: RequestError) -> Self {
        let mut body = Self::new(e.kind(), e.to_string());
        match e {
            RequestError::UnknownModel { model, served } => {
                body.error.model = Some(model);
                body.error.details.insert("served".into(), served.into());
            }
            RequestError::NotRouted { model, loaded, .. } => {
                body.error.model = Some(model);
                let loaded: Vec<String> = loaded.iter().map(ToString::to_string).collect();
                body.error.details.insert("loaded".into(), loaded.into());
            }
            RequestError::NotLoaded { model, version } => {
                body.error.model = Some(model);
                body.error.version = Some(version);
            }
            RequestError::Score { model, version, reason, error } => {
                body.error.model = Some(model);
                body.error.version = Some(version);
                body.error.route = Some(reason.route().to_owned());
                body.error.limit = error.limit().map(|l| l.name().to_owned());
                body.error.message = error.to_string();
                if let ScoreError::InvalidRows { errors } = error {
                    body.error.rows = errors;
                }
            }
            RequestError::Explain { model, version, reason, error } => {
                body.error.model = Some(model);
                body.error.version = Some(version);
                body.error.route = Some(reason.route().to_owned());
                body.error.message = error.to_string();
                if let paddock_host::ExplainError::Score(ScoreError::InvalidRows { errors }) = error {
                    body.error.rows = errors;
                }
            }
        }
        body
    }
}

/// Which side is at fault for an error kind, for status codes.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum Blame {
    /// The request was wrong (4xx).
    Request,
    /// No such model (404).
    NotFound,
    /// A limit stopped the model (500, kind `limit`).
    Limit,
    /// The model failed: trapped, declined, answered outside its contract, or failed to start (502).
    Model,
    /// The server (a bug, 500).
    Server,
}

/// Who is at fault for a registry error.
pub fn blame(e: &RequestError) -> Blame {
    match e {
        RequestError::UnknownModel { .. } | RequestError::NotRouted { .. } => Blame::NotFound,
        RequestError::NotLoaded { .. } => Blame::Server,
        RequestError::Score { error, .. } => match error {
            e if e.is_request_fault() => Blame::Request,
            ScoreError::Sandbox(paddock_host::sandbox::SandboxError::Limit(_)) => Blame::Limit,
            ScoreError::Start(paddock_host::sandbox::StartError::Sandbox {
                error: paddock_host::sandbox::SandboxError::Limit(_),
                ..
            }) => Blame::Limit,
            _ => Blame::Model,
        },
        // Asking a model for what it cannot give is the request's doing;
        // an explanation that breaks its checks is the model's.
        RequestError::Explain { error, .. } => match error {
            paddock_host::ExplainError::Score(e) if e.is_request_fault() => Blame::Request,
            paddock_host::ExplainError::NoExport { .. } | paddock_host::ExplainError::Declined { .. } => Blame::Request,
            _ => Blame::Model,
        },
    }
}
