//! `paddock keygen`: make an ed25519 key pair for signing artifacts.

use std::path::PathBuf;

use anyhow::{Context, Result, bail};
use paddock_host::SecretKey;

use crate::Outcome;
use crate::common::print_json;

/// Make a key pair: DIR/NAME.key (secret: keep it private) and DIR/NAME.pub
/// (give it to the hosts that should trust your artifacts).
#[derive(clap::Args)]
pub struct Args {
    /// Directory to write the key files to.
    #[arg(long, default_value = ".")]
    dir: PathBuf,
    /// Name of the key files.
    #[arg(long)]
    name: String,
    /// Print the result as JSON.
    #[arg(long)]
    json: bool,
}

/// Generates and writes the pair; never overwrites a key.
pub fn run(args: Args) -> Result<Outcome> {
    let secret_path = args.dir.join(format!("{}.key", args.name));
    let public_path = args.dir.join(format!("{}.pub", args.name));
    for p in [&secret_path, &public_path] {
        if p.exists() {
            bail!("{} exists; refusing to overwrite a key", p.display());
        }
    }
    std::fs::create_dir_all(&args.dir).with_context(|| format!("creating {}", args.dir.display()))?;
    let key = SecretKey::generate()?;
    write_private(&secret_path, &key.to_text())?;
    std::fs::write(&public_path, key.public().to_text()).with_context(|| format!("writing {}", public_path.display()))?;
    let id = key.public().id();
    if args.json {
        print_json(&serde_json::json!({ "key_id": id, "secret": secret_path, "public": public_path }))?;
    } else {
        println!("key {id}: secret {} (keep private), public {}", secret_path.display(), public_path.display());
    }
    Ok(Outcome::Ok)
}

/// Writes a file only its owner can read.
fn write_private(path: &std::path::Path, text: &str) -> Result<()> {
    use std::io::Write;
    let mut options = std::fs::OpenOptions::new();
    options.write(true).create_new(true);
    #[cfg(unix)]
    std::os::unix::fs::OpenOptionsExt::mode(&mut options, 0o600);
    let mut file = options.open(path).with_context(|| format!("creating {}", path.display()))?;
    file.write_all(text.as_bytes()).with_context(|| format!("writing {}", path.display()))?;
    Ok(())
}
