//! Why a features plan cannot be put to use: its sources could not be
//! made, or it does not fit a served version's contract or its tables.
//! Every problem is found and reported, not just the first.

use semver::Version;

use super::postgres::PostgresSourceError;
use super::redis::RedisSourceError;
use super::table::TableError;

/// One reason a plan cannot be used, naming its place.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum PlanProblem {
    /// A table source could not be read.
    #[error(transparent)]
    Table(#[from] TableError),
    /// A Redis source could not be made.
    #[error("sources.{source_name}: {error}")]
    Redis {
        /// The source's name in the plan.
        source_name: String,
        /// What went wrong.
        error: RedisSourceError,
    },
    /// A PostgreSQL source could not be made, or its query was refused.
    #[error("sources.{source_name}: {error}")]
    Postgres {
        /// The source's name in the plan.
        source_name: String,
        /// What went wrong.
        error: PostgresSourceError,
    },
    /// A lookup reads a column whose type cannot hold its feature.
    #[error(
        "{model} {version}: feature `{feature}`: source `{source_name}` returns column `{column}` of type {type_name}, not {wanted}"
    )]
    ColumnType {
        /// The model.
        model: String,
        /// The version.
        version: Version,
        /// The feature looked up.
        feature: String,
        /// The PostgreSQL source.
        source_name: String,
        /// The column.
        column: String,
        /// Its type, as PostgreSQL names it.
        type_name: String,
        /// What the feature needs.
        wanted: &'static str,
    },
    /// A lookup combines the values around a cell into a feature that
    /// cannot hold the result (a label, a flag, or a mean of whole numbers).
    #[error(
        "{model} {version}: feature `{feature}` ({domain}) cannot take values combined around a cell: only numbers combine (a mean only into a real feature)"
    )]
    Combine {
        /// The model.
        model: String,
        /// The version.
        version: Version,
        /// The feature.
        feature: String,
        /// Its domain, as the contract writes it.
        domain: String,
    },
    /// The plan sources a feature the version's contract does not have.
    #[error("{model} {version}: the plan sources `{feature}`, which its contract does not have")]
    UnknownFeature {
        /// The model.
        model: String,
        /// The version.
        version: Version,
        /// The feature the plan names.
        feature: String,
    },
    /// The plan marks private a name that is neither one of the model's
    /// keys nor a feature of the version's contract: capture would write
    /// what it meant as it is.
    #[error(
        "{model} {version}: `private` names `{name}`, which is neither a key of the model ({}) nor a feature of its contract",
        keys.join(", ")
    )]
    UnknownPrivate {
        /// The model.
        model: String,
        /// The version.
        version: Version,
        /// The name marked private.
        name: String,
        /// The model's keys.
        keys: Vec<String>,
    },
    /// A required feature of the contract comes from nowhere.
    #[error(
        "{model} {version}: required feature `{feature}` has no source (say `{feature} = \"request\"` if the row carries it)"
    )]
    Unsourced {
        /// The model.
        model: String,
        /// The version.
        version: Version,
        /// The required feature.
        feature: String,
    },
    /// A required feature falls back to absent when its lookup finds nothing.
    #[error(
        "{model} {version}: required feature `{feature}` falls back to absent: give a default, or `missing = \"fail\"`"
    )]
    AbsentFallback {
        /// The model.
        model: String,
        /// The version.
        version: Version,
        /// The required feature.
        feature: String,
    },
    /// A lookup names a column its table (or query) does not have.
    #[error("{model} {version}: feature `{feature}`: source `{source_name}` has no column `{column}` (it has {})", columns.join(", "))]
    NoColumn {
        /// The model.
        model: String,
        /// The version.
        version: Version,
        /// The feature looked up.
        feature: String,
        /// The table source.
        source_name: String,
        /// The column the lookup names.
        column: String,
        /// The columns the table has.
        columns: Vec<String>,
    },
    /// A server source's budget is longer than the version's deadline per call.
    #[error(
        "{model} {version}: feature `{feature}`: source `{source_name}` has a budget of {budget_ms} ms, longer than the version's deadline of {deadline_ms} ms: a lookup must fit inside the call's time"
    )]
    Budget {
        /// The model.
        model: String,
        /// The version.
        version: Version,
        /// The feature looked up.
        feature: String,
        /// The Redis source.
        source_name: String,
        /// The source's budget, in milliseconds.
        budget_ms: u128,
        /// The version's deadline, in milliseconds.
        deadline_ms: u128,
    },
    /// A lookup's source was not loaded.
    #[error("{model} {version}: feature `{feature}`: source `{source_name}` is not loaded")]
    NotLoaded {
        /// The model.
        model: String,
        /// The version.
        version: Version,
        /// The feature looked up.
        feature: String,
        /// The source the lookup names.
        source_name: String,
    },
    /// A lookup's default does not fit the feature's domain.
    #[error("{model} {version}: feature `{feature}`: the default {problem}")]
    Default {
        /// The model.
        model: String,
        /// The version.
        version: Version,
        /// The feature looked up.
        feature: String,
        /// How the default misfits the domain.
        problem: String,
    },
}

/// Every problem that keeps a plan from being used.
#[derive(Debug, thiserror::Error)]
#[error("{}", problems.iter().map(ToString::to_string).collect::<Vec<_>>().join("; "))]
#[non_exhaustive]
pub struct Unusable {
    /// The problems, in the order found.
    pub problems: Vec<PlanProblem>,
}

impl Unusable {
    /// `Ok(value)` when there is no problem, else every problem.
    pub(crate) fn unless<T>(problems: Vec<PlanProblem>, value: T) -> Result<T, Unusable> {
        if problems.is_empty() { Ok(value) } else { Err(Unusable { problems }) }
    }
}
