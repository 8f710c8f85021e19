//! PostgreSQL as a feature source: a table or view a data team refreshes
//! on a schedule, read by key with one query the features plan gives.
//!
//! The query takes every key of a request at once as its one parameter,
//! an array, and returns one row per key found:
//!
//! ```sql
//! SELECT site, avg_minutes_7d, occupancy, updated_at FROM site_stats WHERE site = ANY($1)
//! ```
//!
//! Keys are always sent as that parameter, never written into the query's
//! text, so a key cannot change what the query does. A request costs one
//! round trip per source whatever its number of rows. PostgreSQL runs the
//! one statement against one snapshot: a table rewritten meanwhile is seen
//! whole before or whole after, never mixed within a request.
//!
//! Connections come from a bounded pool (`deadpool-postgres`: a small
//! pool of tokio-postgres clients, each keeping its prepared statements,
//! so the query is prepared once per connection, not per request; sqlx
//! would bring its own driver and macros for one statement). TLS is
//! rustls with the system's roots, as the URL's `sslmode` asks. A
//! password comes from the URL or from an environment variable
//! (`PGPASSWORD` unless the plan names another), and is never printed.
//!
//! When the plan loads, the query is prepared once to learn its columns
//! and their types: a query the server refuses (syntax, an unknown table
//! or column), a key column that is not there, or a column whose type
//! cannot hold its feature refuses the plan, naming the source, column
//! and type. A server that cannot be reached at load does not: the
//! source is made, its lookups fall back until the server answers, and
//! values are then checked as they are read.
//!
//! Faults never hang a request: each read has the source's budget; a
//! connection that kept a read past it is cancelled on the server and
//! dropped, and the source's [breaker](super::breaker) opens, as Redis's
//! does.

use std::collections::HashMap;
use std::sync::Arc;
use std::time::{Duration, Instant};

use deadpool_postgres::{Manager, ManagerConfig, Object, Pool, RecyclingMethod};
use tokio_postgres::types::{FromSql, Kind, Type};
use tokio_postgres_rustls::MakeRustlsConnect;

use super::breaker::Breaker;
use super::counts::{Ended, SourceCounts};
use super::redis::shown_url;
use super::remote::{Asks, Got, Reply, ServerRead, Trouble};
use paddock_host::contract::Domain;

/// How long loading a plan waits to prepare the query.
const LOAD_WAIT: Duration = Duration::from_secs(5);

/// The environment variable a password comes from when neither the URL
/// nor the plan says otherwise (the name libpq reads).
pub const PASSWORD_VARIABLE: &str = "PGPASSWORD";

/// A PostgreSQL source's settings, as the features plan gives them.
#[derive(Clone, Debug, PartialEq, Eq, Hash)]
pub struct PostgresSettings {
    /// `postgresql://user@host:port/database?sslmode=…` (a password in it is never printed).
    pub url: String,
    /// The query: one array parameter (the keys), a column holding each row's key.
    pub query: String,
    /// The column the query returns each row's key in.
    pub key: String,
    /// The column saying when the row was computed (a timestamp, or Unix seconds).
    pub updated: Option<String>,
    /// How long a request may wait for the source.
    pub budget: Duration,
    /// The most connections the pool opens.
    pub connections: usize,
    /// The environment variable holding the password, when the URL has none.
    pub password_variable: Option<String>,
}

/// A PostgreSQL server read as a feature source.
pub struct PostgresSource {
    settings: PostgresSettings,
    described: Option<Described>,
    unchecked: Option<String>,
    /// Taken only when dropped.
    runtime: Option<tokio::runtime::Runtime>,
    inner: Arc<Inner>,
}

/// What a read needs on the source's runtime.
struct Inner {
    pool: Pool,
    tls: MakeRustlsConnect,
    query: String,
    key: String,
    breaker: Breaker,
    counts: Arc<SourceCounts>,
}

impl Drop for PostgresSource {
    /// As [`super::RedisSource`]'s: the runtime is stopped without waiting.
    fn drop(&mut self) {
        if let Some(runtime) = self.runtime.take() {
            runtime.shutdown_background();
        }
    }
}

impl std::fmt::Debug for PostgresSource {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("PostgresSource")
            .field("url", &self.shown_url())
            .field("budget", &self.settings.budget)
            .field("described", &self.described.is_some())
            .finish()
    }
}

/// The query's columns, as the server described them when the plan loaded.
#[derive(Clone, Debug)]
pub struct Described {
    columns: Vec<(String, Type)>,
}

impl Described {
    /// The type of a column the query returns.
    pub fn column(&self, name: &str) -> Option<&Type> {
        self.columns.iter().find(|(n, _)| n == name).map(|(_, t)| t)
    }

    /// The names of the columns, in order.
    pub fn names(&self) -> impl Iterator<Item = &str> {
        self.columns.iter().map(|(n, _)| n.as_str())
    }
}

/// Why a PostgreSQL source could not be made.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum PostgresSourceError {
    /// The address is not a PostgreSQL URL.
    #[error("`{url}` is not a PostgreSQL URL: {problem}")]
    NotAUrl {
        /// The address as given, its password hidden.
        url: String,
        /// What the client said of it.
        problem: String,
    },
    /// The source's own runtime, or its pool, could not start.
    #[error("cannot start the PostgreSQL source: {0}")]
    Start(String),
    /// The server refused to prepare the query.
    #[error("the server refused the query: {problem}")]
    Refused {
        /// What the server said (its message, and where in the query).
        problem: String,
    },
    /// The query does not take the keys as one array parameter.
    #[error(
        "the query takes {found}: it must take the keys as one array parameter, e.g. `WHERE site = ANY($1)` (text[], int4[] or int8[])"
    )]
    Parameter {
        /// The parameters it takes.
        found: String,
    },
    /// A column the source itself reads (`key`, `updated`) is not returned.
    #[error("the query returns no column `{column}` (it returns {})", columns.join(", "))]
    NoColumn {
        /// The column named.
        column: String,
        /// The columns the query returns.
        columns: Vec<String>,
    },
    /// A column the source itself reads is of a type it cannot read as such.
    #[error("column `{column}` is of type {type_name}, not {wanted}")]
    ColumnType {
        /// The column.
        column: String,
        /// Its PostgreSQL type.
        type_name: String,
        /// What it must be.
        wanted: &'static str,
    },
}

/// Whether a column of type `ty` can hold a feature of `domain`: `None`
/// when it can, else what it would have to be.
pub fn misfit(ty: &Type, domain: &Domain) -> Option<&'static str> {
    let numeric = matches!(*ty, Type::FLOAT4 | Type::FLOAT8 | Type::NUMERIC) || integer(ty);
    let fits = match domain {
        Domain::Real(_) => numeric,
        Domain::Whole(_) => integer(ty) || *ty == Type::NUMERIC,
        Domain::Flag => *ty == Type::BOOL || integer(ty),
        Domain::Label(_) => textual(ty),
    };
    (!fits).then_some(match domain {
        Domain::Real(_) => "a number (real, double precision, numeric or an integer type)",
        Domain::Whole(_) => "a whole number (smallint, integer, bigint or numeric)",
        Domain::Flag => "boolean",
        _ => "text (text, varchar, char or name)",
    })
}

fn integer(ty: &Type) -> bool {
    matches!(*ty, Type::INT2 | Type::INT4 | Type::INT8)
}

fn textual(ty: &Type) -> bool {
    matches!(*ty, Type::TEXT | Type::VARCHAR | Type::BPCHAR | Type::NAME)
}

/// How the keys are sent: the query's one parameter.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum KeyArray {
    Text,
    Int4,
    Int8,
}

impl KeyArray {
    fn of(params: &[Type]) -> Result<KeyArray, PostgresSourceError> {
        match params {
            [t] if matches!(*t, Type::TEXT_ARRAY | Type::VARCHAR_ARRAY | Type::BPCHAR_ARRAY | Type::NAME_ARRAY) => {
                Ok(KeyArray::Text)
            }
            [t] if *t == Type::INT4_ARRAY => Ok(KeyArray::Int4),
            [t] if *t == Type::INT8_ARRAY => Ok(KeyArray::Int8),
            [] => Err(PostgresSourceError::Parameter { found: "no parameter".into() }),
            [t] => Err(PostgresSourceError::Parameter { found: format!("one parameter of type {}", t.name()) }),
            more => Err(PostgresSourceError::Parameter {
                found: format!(
                    "{} parameters ({})",
                    more.len(),
                    more.iter().map(Type::name).collect::<Vec<_>>().join(", ")
                ),
            }),
        }
    }
}

impl PostgresSource {
    /// A source for `settings`, counting into `counts`. Prepares the query
    /// once (waiting at most 5 s) to check it and its columns.
    ///
    /// # Errors
    /// [`PostgresSourceError`]: the URL does not parse, the server refused
    /// the query, the query does not take one array of keys, or its key or
    /// `updated` column is missing or of a type that cannot be read so. A
    /// server that cannot be reached is not an error: see
    /// [`PostgresSource::unchecked`].
    pub fn new(settings: PostgresSettings, counts: Arc<SourceCounts>) -> Result<PostgresSource, PostgresSourceError> {
        let shown = shown_url(&settings.url);
        let mut config: tokio_postgres::Config = settings.url.parse().map_err(|e: tokio_postgres::Error| {
            PostgresSourceError::NotAUrl { url: shown.clone(), problem: e.to_string() }
        })?;
        if config.get_password().is_none() {
            let variable = settings.password_variable.as_deref().unwrap_or(PASSWORD_VARIABLE);
            if let Ok(password) = std::env::var(variable) {
                config.password(password);
            }
        }
        if config.get_application_name().is_none() {
            config.application_name("paddock");
        }
        if config.get_connect_timeout().is_none() {
            config.connect_timeout(LOAD_WAIT);
        }
        let tls = tls();
        let manager =
            Manager::from_config(config, tls.clone(), ManagerConfig { recycling_method: RecyclingMethod::Fast });
        let pool = Pool::builder(manager)
            .max_size(settings.connections.max(1))
            .runtime(deadpool_postgres::Runtime::Tokio1)
            .build()
            .map_err(|e| PostgresSourceError::Start(e.to_string()))?;
        let runtime = tokio::runtime::Builder::new_multi_thread()
            .worker_threads(1)
            .thread_name("paddock-postgres")
            .enable_all()
            .build()
            .map_err(|e| PostgresSourceError::Start(e.to_string()))?;
        let inner = Arc::new(Inner {
            pool,
            tls,
            query: settings.query.clone(),
            key: settings.key.clone(),
            breaker: Breaker::default(),
            counts,
        });
        let (tx, rx) = std::sync::mpsc::sync_channel(1);
        let describing = Arc::clone(&inner);
        runtime.spawn(async move {
            let described = tokio::time::timeout(LOAD_WAIT, describing.describe()).await;
            drop(tx.send(described));
        });
        let (described, unchecked) = match rx.recv_timeout(LOAD_WAIT + Duration::from_secs(1)) {
            Ok(Ok(Ok(Ok(d)))) => (Some(d), None),
            Ok(Ok(Ok(Err(refused)))) => return Err(refused),
            Ok(Ok(Err(unreachable))) => (None, Some(unreachable)),
            Ok(Err(_)) | Err(_) => (None, Some(format!("no answer within {} s", LOAD_WAIT.as_secs()))),
        };
        let source = PostgresSource { settings, described, unchecked, runtime: Some(runtime), inner };
        if let Some(d) = &source.described {
            source.check_own_columns(d)?;
        }
        Ok(source)
    }

    /// The key column and the `updated` column are returned, of types the
    /// source can read so.
    fn check_own_columns(&self, d: &Described) -> Result<(), PostgresSourceError> {
        let no_column = |column: &str| PostgresSourceError::NoColumn {
            column: column.to_owned(),
            columns: d.names().map(str::to_owned).collect(),
        };
        let key = d.column(&self.settings.key).ok_or_else(|| no_column(&self.settings.key))?;
        if !(textual(key) || integer(key)) {
            return Err(PostgresSourceError::ColumnType {
                column: self.settings.key.clone(),
                type_name: key.name().to_owned(),
                wanted: "text or an integer type (a key)",
            });
        }
        if let Some(updated) = &self.settings.updated {
            let ty = d.column(updated).ok_or_else(|| no_column(updated))?;
            if !matches!(*ty, Type::TIMESTAMPTZ | Type::TIMESTAMP) && misfit(ty, &real()).is_some() {
                return Err(PostgresSourceError::ColumnType {
                    column: updated.clone(),
                    type_name: ty.name().to_owned(),
                    wanted: "a timestamp, or a number of Unix seconds",
                });
            }
        }
        Ok(())
    }

    /// The server's URL without its password, for status pages and logs.
    pub fn shown_url(&self) -> String {
        shown_url(&self.settings.url)
    }

    /// The source's settings.
    pub fn settings(&self) -> &PostgresSettings {
        &self.settings
    }

    /// The query's columns, when the server described them at load.
    pub fn described(&self) -> Option<&Described> {
        self.described.as_ref()
    }

    /// Why the query's columns were not checked at load (the server could
    /// not be reached), if they were not.
    pub fn unchecked(&self) -> Option<&str> {
        self.unchecked.as_deref()
    }
}

impl ServerRead for PostgresSource {
    fn budget(&self) -> Duration {
        self.settings.budget
    }

    fn breaker(&self) -> &Breaker {
        &self.inner.breaker
    }

    fn counts(&self) -> &SourceCounts {
        &self.inner.counts
    }

    /// One query, every key in its array parameter.
    fn dispatch(&self, asks: &Asks, reply: Reply) {
        let inner = Arc::clone(&self.inner);
        let asks = asks.to_vec();
        let budget = self.settings.budget;
        let sent = Instant::now();
        let Some(runtime) = &self.runtime else { unreachable!("the runtime lives as long as the source") };
        runtime.spawn(async move {
            let read = inner.read(&asks, sent + budget).await;
            let took = sent.elapsed();
            let (ended, outcome) = match read {
                Ok(replies) => (Ended::Answered, Ok(replies)),
                Err(Failure::Late) => (Ended::TimedOut, Err(Trouble::Timeout { budget_ms: budget.as_millis() })),
                Err(Failure::Failed(problem) | Failure::Lost(problem)) => {
                    (Ended::Failed, Err(Trouble::Failed(problem)))
                }
            };
            inner.counts.round_trip(ended, took);
            match &outcome {
                Ok(_) => inner.breaker.answered(),
                Err(_) => inner.breaker.failed(),
            }
            reply.send(outcome);
        });
    }
}

/// Why a read got nothing, before it is counted.
enum Failure {
    /// Past the budget.
    Late,
    /// The server answered with an error; the connection is fine.
    Failed(String),
    /// The connection failed: it leaves the pool.
    Lost(String),
}

impl From<tokio_postgres::Error> for Failure {
    fn from(e: tokio_postgres::Error) -> Failure {
        match e.as_db_error() {
            Some(_) => Failure::Failed(refused(&e).to_string()),
            None => Failure::Lost(chain(&e)),
        }
    }
}

impl Inner {
    /// Prepares the query on a connection of the pool (which keeps it
    /// prepared there) and reads its columns. The outer error: the server
    /// could not be reached; the inner: it refused the query, or the query
    /// does not take an array of keys.
    async fn describe(&self) -> Result<Result<Described, PostgresSourceError>, String> {
        let client = self.pool.get().await.map_err(|e| chain(&e))?;
        let statement = match client.prepare_cached(&self.query).await {
            Ok(s) => s,
            Err(e) if e.as_db_error().is_some() => return Ok(Err(refused(&e))),
            Err(e) => return Err(chain(&e)),
        };
        if let Err(e) = KeyArray::of(statement.params()) {
            return Ok(Err(e));
        }
        let columns = statement.columns().iter().map(|c| (c.name().to_owned(), c.type_().clone())).collect();
        Ok(Ok(Described { columns }))
    }

    /// One request's read: a connection, the prepared query, every key at
    /// once; done by `deadline`.
    async fn read(&self, asks: &Asks, deadline: Instant) -> Result<super::remote::Replies, Failure> {
        let left = || deadline.saturating_duration_since(Instant::now());
        let client = match tokio::time::timeout(left(), self.pool.get()).await {
            Ok(Ok(c)) => c,
            Ok(Err(e)) => return Err(Failure::Failed(chain(&e))),
            Err(_) => return Err(Failure::Late),
        };
        let query = async {
            let statement = client.prepare_cached(&self.query).await.map_err(Failure::from)?;
            // PostgreSQL text cannot hold a NUL: such a key matches nothing,
            // and is left out rather than fail the other keys' read. Keys
            // that are not whole numbers cannot match an integer key either.
            let keys: Vec<&str> = asks.iter().map(|(k, _)| k.as_str()).filter(|k| !k.contains('\0')).collect();
            let rows = match KeyArray::of(statement.params()).map_err(|e| Failure::Failed(e.to_string()))? {
                KeyArray::Text => client.query(&statement, &[&keys]).await,
                KeyArray::Int4 => {
                    let ints: Vec<i32> = keys.iter().filter_map(|k| k.parse().ok()).collect();
                    client.query(&statement, &[&ints]).await
                }
                KeyArray::Int8 => {
                    let ints: Vec<i64> = keys.iter().filter_map(|k| k.parse().ok()).collect();
                    client.query(&statement, &[&ints]).await
                }
            }
            .map_err(Failure::from)?;
            Ok::<_, Failure>((statement, rows))
        };
        match tokio::time::timeout(left(), query).await {
            Ok(Ok((statement, rows))) => answers(&statement, &rows, &self.key, asks).map_err(Failure::Failed),
            Ok(Err(Failure::Lost(problem))) => {
                // The connection is gone or unusable: out of the pool.
                drop(Object::take(client));
                Err(Failure::Failed(problem))
            }
            Ok(Err(other)) => Err(other),
            Err(_) => {
                // The server may still be running the query: cancel it,
                // and drop the connection rather than queue the next
                // request behind it.
                let token = client.cancel_token();
                let tls = self.tls.clone();
                drop(Object::take(client));
                tokio::spawn(async move { drop(token.cancel_query(tls).await) });
                Err(Failure::Late)
            }
        }
    }
}

/// The rows' values, per key asked and field, by column name.
fn answers(
    statement: &tokio_postgres::Statement,
    rows: &[tokio_postgres::Row],
    key: &str,
    asks: &Asks,
) -> Result<super::remote::Replies, String> {
    let columns = statement.columns();
    let at = |name: &str| columns.iter().position(|c| c.name() == name);
    let key_at = at(key).ok_or_else(|| format!("the query returns no column `{key}`"))?;
    let mut by_key: HashMap<String, usize> = HashMap::with_capacity(rows.len());
    for (i, row) in rows.iter().enumerate() {
        let Some(k) = key_text(row, key_at).map_err(|e| format!("key column `{key}`: {e}"))? else { continue };
        // The first row of a key is the one read.
        by_key.entry(k).or_insert(i);
    }
    let mut replies = Vec::with_capacity(asks.len());
    for (k, fields) in asks {
        let row = by_key.get(k).map(|&i| &rows[i]);
        let mut values = Vec::with_capacity(fields.len());
        for f in fields {
            let value = match (row, at(f)) {
                (Some(row), Some(i)) => row
                    .try_get::<_, Option<Cell>>(i)
                    .map_err(|e| format!("column `{f}` under key `{k}`: {e}"))?
                    .map(|c| c.0),
                _ => None,
            };
            values.push(value);
        }
        replies.push(values);
    }
    Ok(replies)
}

/// A row's key as text: integers written whole.
fn key_text(row: &tokio_postgres::Row, at: usize) -> Result<Option<String>, tokio_postgres::Error> {
    Ok(match *row.columns()[at].type_() {
        Type::INT2 => row.try_get::<_, Option<i16>>(at)?.map(|i| i.to_string()),
        Type::INT4 => row.try_get::<_, Option<i32>>(at)?.map(|i| i.to_string()),
        Type::INT8 => row.try_get::<_, Option<i64>>(at)?.map(|i| i.to_string()),
        _ => row.try_get::<_, Option<Cell>>(at)?.map(|c| match c.0 {
            Got::Text(t) => t,
            Got::Number(n) => n.to_string(),
        }),
    })
}

/// An error and each cause under it, `: `-joined (the client's errors keep
/// the why — "password missing", "connection refused" — in their causes).
fn chain(e: &dyn std::error::Error) -> String {
    let mut text = e.to_string();
    let mut cause = e.source();
    while let Some(c) = cause {
        let said = c.to_string();
        if !text.contains(&said) {
            text.push_str(": ");
            text.push_str(&said);
        }
        cause = c.source();
    }
    text
}

/// What the server said when it refused the query, and where.
fn refused(e: &tokio_postgres::Error) -> PostgresSourceError {
    let problem = match e.as_db_error() {
        Some(db) => {
            let mut text = format!("{}: {}", db.severity(), db.message());
            if let Some(tokio_postgres::error::ErrorPosition::Original(at)) = db.position() {
                text.push_str(&format!(" (at character {at})"));
            }
            if let Some(hint) = db.hint() {
                text.push_str(&format!("; hint: {hint}"));
            }
            text
        }
        None => chain(e),
    };
    PostgresSourceError::Refused { problem }
}

/// rustls with the ring provider and the system's roots (none is fine
/// until a URL asks for TLS).
fn tls() -> MakeRustlsConnect {
    let mut roots = rustls::RootCertStore::empty();
    roots.add_parsable_certificates(rustls_native_certs::load_native_certs().certs);
    let config = rustls::ClientConfig::builder_with_provider(Arc::new(rustls::crypto::ring::default_provider()))
        .with_safe_default_protocol_versions()
        .map(|b| b.with_root_certificates(roots).with_no_client_auth())
        .unwrap_or_else(|_| unreachable!("ring supports the default protocol versions"));
    MakeRustlsConnect::new(config)
}

fn real() -> Domain {
    Domain::Real(paddock_host::contract::Bounds { min: None, max: None })
}

/// One value of a column, as a feature reads it.
struct Cell(Got);

impl<'a> FromSql<'a> for Cell {
    fn from_sql(ty: &Type, raw: &'a [u8]) -> Result<Cell, Box<dyn std::error::Error + Sync + Send>> {
        let got = match *ty {
            Type::FLOAT8 => Got::Number(f64::from_sql(ty, raw)?),
            Type::FLOAT4 => Got::Number(f32::from_sql(ty, raw)?.into()),
            Type::INT2 => Got::Number(i16::from_sql(ty, raw)?.into()),
            Type::INT4 => Got::Number(i32::from_sql(ty, raw)?.into()),
            Type::INT8 => Got::Number(i64::from_sql(ty, raw)? as f64),
            Type::NUMERIC => Got::Number(numeric(raw)?),
            Type::BOOL => Got::Number(if bool::from_sql(ty, raw)? { 1.0 } else { 0.0 }),
            Type::TIMESTAMPTZ | Type::TIMESTAMP => Got::Number(unix_seconds(raw)?),
            Type::BPCHAR => Got::Text(String::from_sql(ty, raw)?.trim_end_matches(' ').to_owned()),
            _ => Got::Text(String::from_sql(ty, raw)?),
        };
        Ok(Cell(got))
    }

    fn accepts(ty: &Type) -> bool {
        matches!(*ty, Type::FLOAT4 | Type::FLOAT8 | Type::NUMERIC | Type::BOOL | Type::TIMESTAMPTZ | Type::TIMESTAMP)
            || integer(ty)
            || textual(ty)
            || matches!(ty.kind(), Kind::Domain(base) if Cell::accepts(base))
    }
}

/// Microseconds since 2000-01-01 (PostgreSQL's epoch) to Unix seconds.
fn unix_seconds(raw: &[u8]) -> Result<f64, Box<dyn std::error::Error + Sync + Send>> {
    const POSTGRES_EPOCH: f64 = 946_684_800.0;
    let micros = postgres_protocol::types::timestamp_from_sql(raw)?;
    if micros == i64::MAX || micros == i64::MIN {
        return Err("an infinite timestamp is not a time".into());
    }
    Ok(POSTGRES_EPOCH + micros as f64 / 1e6)
}

/// A `numeric` in PostgreSQL's binary form, as the nearest `f64`.
///
/// The form (PostgreSQL's `numeric.c`, `numeric_send`): the number of
/// base-10 000 digits, the weight of the first, a sign word, the display
/// scale, then the digits. They are written out as decimal text and
/// parsed, so the result is the value rounded once, as `::float8` does
/// (no crate here decodes `numeric` to a float; the integration tests
/// check it against the server's own cast).
fn numeric(raw: &[u8]) -> Result<f64, Box<dyn std::error::Error + Sync + Send>> {
    let word = |at: usize| -> Result<u16, Box<dyn std::error::Error + Sync + Send>> {
        raw.get(at..at + 2).map(|b| u16::from_be_bytes([b[0], b[1]])).ok_or_else(|| "a numeric cut short".into())
    };
    let count = usize::from(word(0)?);
    let weight = i64::from(word(2)? as i16);
    let sign = word(4)?;
    match sign {
        0x0000 | 0x4000 => {}
        0xC000 => return Ok(f64::NAN),
        0xD000 => return Ok(f64::INFINITY),
        0xF000 => return Ok(f64::NEG_INFINITY),
        other => return Err(format!("a numeric with sign word {other:#x}").into()),
    }
    if count == 0 {
        return Ok(0.0);
    }
    let mut text = String::with_capacity(count * 4 + 8);
    if sign == 0x4000 {
        text.push('-');
    }
    for i in 0..count {
        let digit = word(8 + 2 * i)?;
        if digit > 9999 {
            return Err(format!("a numeric digit of {digit}").into());
        }
        text.push_str(&format!("{digit:04}"));
    }
    // The last base-10 000 digit has weight `weight - count + 1`.
    let exponent = 4 * (weight - count as i64 + 1);
    text.push_str(&format!("e{exponent}"));
    Ok(text.parse::<f64>()?)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// `numeric_send`'s form of a value: digits base 10 000, weight, sign.
    fn form(digits: &[u16], weight: i16, negative: bool) -> Vec<u8> {
        let mut raw = Vec::new();
        raw.extend((digits.len() as u16).to_be_bytes());
        raw.extend(weight.to_be_bytes());
        raw.extend((if negative { 0x4000u16 } else { 0 }).to_be_bytes());
        raw.extend(0u16.to_be_bytes());
        for d in digits {
            raw.extend(d.to_be_bytes());
        }
        raw
    }

    #[test]
    fn numerics_read_as_the_nearest_double() {
        // 42.5 = 42 × 10000^0 + 5000 × 10000^-1.
        assert_eq!(numeric(&form(&[42, 5000], 0, false)).unwrap(), 42.5);
        // -1234567.0001 = 123 × 10000^1 + 4567 + 1 × 10000^-1.
        assert_eq!(numeric(&form(&[123, 4567, 1], 1, true)).unwrap(), -1_234_567.000_1);
        // 0.000012 = 1200 × 10000^-2.
        assert_eq!(numeric(&form(&[1200], -2, false)).unwrap(), 0.000_012);
        // 0.1 rounds once, to the double nearest a tenth.
        assert_eq!(numeric(&form(&[1000], -1, false)).unwrap(), 0.1);
        assert_eq!(numeric(&form(&[], 0, false)).unwrap(), 0.0);
        assert!(numeric(&[0, 1]).is_err(), "cut short");
        assert!(numeric(&form(&[10000], 0, false)).is_err(), "a digit past 9999");
    }

    #[test]
    fn the_keys_go_as_one_array_parameter() {
        assert_eq!(KeyArray::of(&[Type::TEXT_ARRAY]).unwrap(), KeyArray::Text);
        assert_eq!(KeyArray::of(&[Type::INT8_ARRAY]).unwrap(), KeyArray::Int8);
        assert_eq!(
            KeyArray::of(&[Type::TEXT]).unwrap_err().to_string(),
            "the query takes one parameter of type text: it must take the keys as one array parameter, e.g. `WHERE site = ANY($1)` (text[], int4[] or int8[])"
        );
        assert!(KeyArray::of(&[]).unwrap_err().to_string().starts_with("the query takes no parameter"));
    }
}
