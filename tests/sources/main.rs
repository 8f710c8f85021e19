//! Feature sources on real servers, one test binary for all (each test
//! starts its own server on a loopback port, and stops it after):
//! `redis` against Debian's `redis-server`, `postgres` against a cluster of
//! Debian's `postgresql` that `initdb` makes.

mod postgres;
mod redis;

use std::time::Duration;

use paddock_host::Row;
use paddock_serve::features::Outcome;
use paddock_serve::{Registry, Request, RequestContext};

/// Scores one row of `m` for `site`: its value, or NaN when it got none,
/// and what became of `x`.
fn ask(reg: &Registry, site: &str) -> (f64, Outcome) {
    let context: RequestContext = [("site".to_owned(), site.to_owned())].into();
    let a = reg.score(&Request::new("m", &context, &[Row::new()]).every_lookup()).unwrap_or_else(|e| panic!("{e}"));
    let value = a.rows().next().unwrap().map_or(f64::NAN, |r| r[0]);
    (value, a.lookups[0].first().map_or(Outcome::Found, |f| f.outcome))
}

/// Asks for site `a` until its new `x = 4` is read (y = 9): once a server
/// is back, the breaker's pause ends and the source reconnects by itself.
fn assert_resumes(reg: &Registry) {
    let mut answers = Vec::new();
    let resumed = paddock_tests::came_true(Duration::from_secs(60), Duration::from_millis(10), || {
        let got = ask(reg, "a");
        answers.push(got.1);
        got == (9.0, Outcome::Found)
    });
    assert!(resumed, "reads did not resume: {:?}", &answers[answers.len().saturating_sub(5)..]);
}
