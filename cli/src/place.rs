//! Where a store is: a directory, or a shared store in NATS JetStream
//! (`nats://HOST:PORT/NAME`), with the flags that reach its server; and
//! opening either for a command.

use std::path::PathBuf;
use std::time::Duration;

use anyhow::{Context, Result};
use paddock_serve::registry::Watcher;
use paddock_serve::shared::mirror::{Mirror, MirrorOptions};
use paddock_serve::shared::{Credentials, SharedStore, StoreAddress};
use paddock_serve::{Registry, RegistryOptions};

/// A store's place, as `--store` names it.
#[derive(Clone, Debug)]
pub enum Place {
    /// A directory.
    Dir(PathBuf),
    /// A shared store.
    Shared(StoreAddress),
}

impl Place {
    /// Reads `--store`: an address when it starts with `nats://` or
    /// `tls://`, a directory otherwise.
    pub fn parse(text: &str) -> Result<Place, String> {
        if StoreAddress::looks_like(text) {
            StoreAddress::parse(text).map(Place::Shared).map_err(|e| e.to_string())
        } else {
            Ok(Place::Dir(PathBuf::from(text)))
        }
    }
}

impl std::fmt::Display for Place {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            Place::Dir(d) => write!(f, "{}", d.display()),
            Place::Shared(a) => write!(f, "{a}"),
        }
    }
}

/// How to reach a shared store's server. Secrets come from files or the
/// environment, never from the command line, and are never printed.
#[derive(clap::Args, Clone, Debug, Default)]
pub struct NatsArgs {
    /// For a shared store: the NATS user (its password from PADDOCK_NATS_PASSWORD)
    /// [default: PADDOCK_NATS_USER].
    #[arg(long, value_name = "NAME")]
    pub nats_user: Option<String>,
    /// For a shared store: a file holding the NATS token [default: PADDOCK_NATS_TOKEN].
    #[arg(long, value_name = "FILE")]
    pub nats_token_file: Option<PathBuf>,
    /// For a shared store: a NATS credentials file (JWT and seed) [default: PADDOCK_NATS_CREDS].
    #[arg(long, value_name = "FILE")]
    pub nats_creds: Option<PathBuf>,
    /// For a shared store: certificates (PEM) to trust for the server's TLS [default: PADDOCK_NATS_CA].
    #[arg(long, value_name = "FILE")]
    pub nats_ca: Option<PathBuf>,
    /// For a shared store: a client certificate (PEM) for servers that ask; with --nats-key.
    #[arg(long, value_name = "FILE", requires = "nats_key")]
    pub nats_cert: Option<PathBuf>,
    /// For a shared store: the client certificate's key (PEM).
    #[arg(long, value_name = "FILE", requires = "nats_cert")]
    pub nats_key: Option<PathBuf>,
    /// For a shared store: refuse a connection without TLS (also: a tls:// address).
    #[arg(long)]
    pub nats_tls: bool,
}

impl NatsArgs {
    /// The credentials these flags and the environment describe.
    pub fn credentials(&self) -> Result<Credentials> {
        let mut c = Credentials::from_env();
        if let Some(user) = &self.nats_user {
            let password = std::env::var("PADDOCK_NATS_PASSWORD").unwrap_or_default();
            c.user = Some((user.clone(), password));
        }
        if let Some(file) = &self.nats_token_file {
            let token = std::fs::read_to_string(file)
                .with_context(|| format!("reading the NATS token from {}", file.display()))?;
            c.token = Some(token.trim().to_owned());
        }
        if let Some(f) = &self.nats_creds {
            c.creds_file = Some(f.clone());
        }
        if let Some(f) = &self.nats_ca {
            c.ca_file = Some(f.clone());
        }
        if let (Some(cert), Some(key)) = (&self.nats_cert, &self.nats_key) {
            c.client_cert = Some((cert.clone(), key.clone()));
        }
        c.require_tls |= self.nats_tls;
        Ok(c)
    }
}

/// A store opened for a command: its registry, and what keeps it current
/// (a directory watcher or a shared store's mirror) until dropped.
pub struct Opened {
    /// The registry serving it.
    pub registry: Registry,
    place: Place,
    mirror: Option<Mirror>,
    watcher: Option<Watcher>,
    /// A scratch state directory, removed after the mirror stops.
    _scratch: Option<tempfile::TempDir>,
}

impl Opened {
    /// Keeps a directory store current by watching it (file-system events,
    /// and a rescan every `rescan`); a shared store's mirror follows its
    /// store already.
    pub fn keep_current(&mut self, rescan: Duration) -> Result<()> {
        if let Place::Dir(_) = self.place {
            self.watcher = Some(self.registry.watch(Duration::from_millis(200), rescan)?);
        }
        Ok(())
    }

    /// Stops following the store (the watcher or the mirror).
    pub fn stop(&mut self) {
        self.watcher.take();
        self.mirror.take();
    }
}

/// Opens a store: a directory with [`Registry::open`], a shared store
/// through a mirror in the state directory (required, unless `scratch`:
/// then a temporary one, for a look).
pub fn open(
    place: &Place,
    runtime: &paddock_host::Runtime,
    mut options: RegistryOptions,
    nats: &NatsArgs,
    host: Option<&str>,
    scratch: bool,
) -> Result<Opened> {
    match place {
        Place::Dir(dir) => {
            let registry = Registry::open(runtime, dir, options)
                .with_context(|| format!("opening the store {}", dir.display()))?;
            Ok(Opened { registry, place: place.clone(), mirror: None, watcher: None, _scratch: None })
        }
        Place::Shared(address) => {
            let mut scratch_dir = None;
            if options.state_dir.is_none() {
                anyhow::ensure!(
                    scratch,
                    "a shared store is mirrored into the host's state directory: give one with --state DIR"
                );
                let dir = tempfile::tempdir().context("making a scratch state directory")?;
                options.state_dir = Some(dir.path().to_owned());
                scratch_dir = Some(dir);
            }
            let mut mirror = MirrorOptions::default();
            if let Some(h) = host {
                mirror.host = h.to_owned();
            }
            let (registry, handle) = Mirror::open(runtime, address, &nats.credentials()?, options, mirror)
                .with_context(|| format!("opening the shared store {address}"))?;
            Ok(Opened { registry, place: place.clone(), mirror: Some(handle), watcher: None, _scratch: scratch_dir })
        }
    }
}

/// Connects to a shared store for a command that changes or lists it
/// (`create`: make its buckets when absent, as publishing does).
pub fn connect(runtime: &tokio::runtime::Runtime, place: &Place, nats: &NatsArgs, create: bool) -> Result<SharedStore> {
    let Place::Shared(address) = place else {
        anyhow::bail!("{place} is a directory: this command works on a shared store (nats://HOST:PORT/NAME)")
    };
    let credentials = nats.credentials()?;
    runtime.block_on(SharedStore::connect(address, &credentials, create)).map_err(Into::into)
}

/// What every command that changes or lists a shared store takes.
#[derive(clap::Args, Clone, Debug)]
pub struct SharedArgs {
    /// The shared store: nats://HOST:PORT/NAME.
    #[arg(long, value_name = "ADDRESS", value_parser = Place::parse)]
    pub store: Place,
    #[command(flatten)]
    pub nats: NatsArgs,
}

impl SharedArgs {
    /// A runtime for the client, and the store, connected (`create`: make
    /// its buckets when absent, as publishing does).
    pub fn connect(&self, create: bool) -> Result<(tokio::runtime::Runtime, SharedStore)> {
        let runtime = tokio::runtime::Builder::new_current_thread().enable_all().build()?;
        let store = connect(&runtime, &self.store, &self.nats, create)?;
        Ok((runtime, store))
    }
}

/// Reads an entry's name: routes, features or limits.
pub fn file_entry(text: &str) -> Result<paddock_serve::shared::FileEntry, String> {
    use paddock_serve::shared::FileEntry;
    FileEntry::ALL
        .into_iter()
        .find(|e| e.key() == text)
        .ok_or_else(|| format!("`{text}` is not an entry: say routes, features or limits"))
}
