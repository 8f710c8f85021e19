//! Serve a store of model versions: route by context and time, watch the
//! directory, and swap versions without a restart.
//!
//! ```text
//! cargo xtask build && cargo run -p paddock-examples --example store
//! ```
//!
//! Works on a copy of the demo store in a temporary directory, so it can
//! change the routes freely.

use std::time::{Duration, Instant};

use anyhow::{Context as _, Result};
use paddock_host::{Row, Runtime};
use paddock_serve::registry::ROUTES_FILE;
use paddock_serve::{Registry, RegistryOptions, Request, RequestContext};

fn main() -> Result<()> {
    let demo = paddock_examples::demo_store();
    let store = std::env::temp_dir().join(format!("paddock-example-store-{}", std::process::id()));
    copy_dir(&demo, &store).with_context(|| format!("copying {} (run `cargo xtask build` first)", demo.display()))?;

    // Every artifact passes the gate (trust, compile, contract, its own checks)
    // before routes may point to it. Compiled code is cached in STORE/.paddock.
    let runtime = Runtime::new()?;
    let registry = Registry::open(&runtime, &store, RegistryOptions::default())?;
    for a in registry.status().artifacts {
        println!("{:<32} {:?} used by {:?}", a.path.display(), a.state, a.used_by);
    }

    // A request names the model, carries context and (optionally) its time.
    let north: RequestContext =
        [("site", "Depot North"), ("region", "north")].map(|(k, v)| (k.to_owned(), v.to_owned())).into();
    let row = Row::new()
        .with("expected_minutes", 95.0)
        .with("plugin_hour", 18i64)
        .with("member_overstay_rate", 0.2)
        .with("site_occupancy", 0.7)
        .with("weekend", false)
        .with("fleet", false);
    let ask = |registry: &Registry| -> Result<String> {
        let rows = [row.clone()];
        let a = registry.score(&Request::new("overstay-risk", &north, &rows))?;
        Ok(format!("{:.3} from {} ({})", a.estimates.values_at(0)[0], a.version, a.reason))
    };
    println!("\nnorth: {}", ask(&registry)?);

    // Watch the directory; a routes change is live without a restart.
    let _watch = registry.watch(Duration::from_millis(50), Duration::from_secs(30))?;
    let routes = std::fs::read_to_string(store.join(ROUTES_FILE))?;
    let changed = routes.replace("name = \"north\"\nversion = \"1.1.0\"", "name = \"north\"\nversion = \"1.0.0\"");
    let tmp = store.join("routes.toml.partial");
    std::fs::write(&tmp, changed)?;
    std::fs::rename(&tmp, store.join(ROUTES_FILE))?; // write, then rename: never half a file
    let until = Instant::now() + Duration::from_secs(10);
    let before = registry.generation();
    while registry.generation() == before && Instant::now() < until {
        std::thread::sleep(Duration::from_millis(10));
    }
    anyhow::ensure!(registry.generation() != before, "the watcher did not pick up the routes change within 10 s");
    println!("after the routes change (generation {}): {}", registry.generation(), ask(&registry)?);

    // What each version cost so far.
    for v in registry.usage().versions.iter().filter(|v| v.calls > 0) {
        println!("{} {}: {} calls, p50 {:.1} µs", v.model, v.version, v.calls, v.wall_us.p50);
    }
    std::fs::remove_dir_all(&store)?;
    Ok(())
}

fn copy_dir(from: &std::path::Path, to: &std::path::Path) -> std::io::Result<()> {
    std::fs::create_dir_all(to)?;
    for entry in std::fs::read_dir(from)? {
        let entry = entry?;
        let name = entry.file_name();
        if name.to_string_lossy().starts_with('.') {
            continue;
        }
        if entry.file_type()?.is_dir() {
            copy_dir(&entry.path(), &to.join(&name))?;
        } else {
            std::fs::copy(entry.path(), to.join(&name))?;
        }
    }
    Ok(())
}
