//! `paddock voucher`: make a voucher, the key pair that vouches for artifacts.

use std::path::PathBuf;

use anyhow::{Context, Result, bail};
use paddock_host::VouchingKey;
use paddock_host::artifact::trust::{VOUCHER_SUFFIX, VOUCHING_KEY_SUFFIX};

use crate::Outcome;
use crate::common::print_json;

/// Make a voucher: DIR/NAME.vouching-key (secret: keep it private) and
/// DIR/NAME.voucher (give it to the hosts that should admit what you vouch for).
#[derive(clap::Args)]
pub struct Args {
    /// The voucher's name (letters, digits, `-`, `_`, `.`): names its files.
    name: String,
    /// Directory to write the two files to.
    #[arg(long, value_name = "DIR", default_value = ".")]
    dir: PathBuf,
    /// Print the result as JSON.
    #[arg(long)]
    json: bool,
}

/// Generates and writes the pair; never overwrites either file.
pub fn run(args: Args) -> Result<Outcome> {
    let key = VouchingKey::generate(&args.name)?;
    let secret_path = args.dir.join(format!("{}.{VOUCHING_KEY_SUFFIX}", args.name));
    let public_path = args.dir.join(format!("{}.{VOUCHER_SUFFIX}", args.name));
    for p in [&secret_path, &public_path] {
        if p.exists() {
            bail!("{} exists; a voucher is never overwritten", p.display());
        }
    }
    std::fs::create_dir_all(&args.dir).with_context(|| format!("creating {}", args.dir.display()))?;
    write_private(&secret_path, &key.to_text())?;
    let voucher = key.voucher();
    std::fs::write(&public_path, voucher.to_text()).with_context(|| format!("writing {}", public_path.display()))?;
    let id = voucher.id();
    if args.json {
        print_json(
            &serde_json::json!({ "voucher": id, "name": args.name, "vouching_key": secret_path, "public": public_path }),
        )?;
    } else {
        outln!(
            "voucher {} (id {id}): vouching key {} (keep it private), public file {}",
            args.name,
            secret_path.display(),
            public_path.display()
        )?;
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
