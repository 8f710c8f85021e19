//! Feature sources on real servers, one test binary for all (each test
//! starts its own server on a loopback port, and stops it after):
//! `redis` against Debian's `redis-server`, `postgres` against a cluster of
//! Debian's `postgresql` that `initdb` makes.

mod postgres;
mod redis;
