//! Files replaced whole or not at all: written to a temporary file of a
//! unique name beside the target, synced, then renamed over it. A reader
//! sees the old file or the new one, never a part; two writers of one path
//! (threads or processes) never truncate each other's file; a failed write
//! leaves nothing behind.

use std::io::Write;
use std::path::Path;

/// Writes `path` atomically with what `fill` writes.
///
/// # Errors
/// The I/O error of creating, writing, syncing or renaming the temporary
/// file (which is removed).
pub fn write_with(path: &Path, fill: impl FnOnce(&mut std::fs::File) -> std::io::Result<()>) -> std::io::Result<()> {
    let dir = match path.parent() {
        Some(d) if !d.as_os_str().is_empty() => d,
        _ => Path::new("."),
    };
    let name = path.file_name().map(|n| n.to_string_lossy().into_owned()).unwrap_or_default();
    let mut tmp = tempfile::Builder::new().prefix(&format!(".{name}.")).suffix(".tmp").tempfile_in(dir)?;
    fill(tmp.as_file_mut())?;
    tmp.as_file_mut().flush()?;
    tmp.as_file().sync_all()?;
    tmp.persist(path).map_err(|e| e.error)?;
    Ok(())
}

/// Writes `bytes` to `path` atomically. The file is readable by its owner
/// only (the temporary file's mode, 0600 on Unix).
///
/// # Errors
/// As [`write_with`].
pub fn write(path: &Path, bytes: &[u8]) -> std::io::Result<()> {
    write_with(path, |f| f.write_all(bytes))
}

/// Writes `bytes` to `path` atomically, readable by everyone (0644 on
/// Unix) as build outputs are: artifacts and vouches, which are not secrets.
///
/// # Errors
/// As [`write_with`].
pub fn write_readable(path: &Path, bytes: &[u8]) -> std::io::Result<()> {
    write_with(path, |f| {
        #[cfg(unix)]
        {
            use std::os::unix::fs::PermissionsExt as _;
            f.set_permissions(std::fs::Permissions::from_mode(0o644))?;
        }
        f.write_all(bytes)
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn many_writers_of_one_path_each_land_a_whole_file() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("entry");
        std::thread::scope(|s| {
            for t in 0..8u8 {
                let path = &path;
                s.spawn(move || {
                    for _ in 0..50 {
                        write(path, &[t; 4096]).unwrap();
                        let got = std::fs::read(path).unwrap();
                        assert_eq!(got.len(), 4096);
                        assert!(got.iter().all(|&b| b == got[0]), "a file mixed two writers");
                    }
                });
            }
        });
        // Nothing but the file itself is left.
        assert_eq!(std::fs::read_dir(dir.path()).unwrap().count(), 1);
    }

    #[cfg(unix)]
    #[test]
    fn readable_files_are_0644_and_others_0600() {
        use std::os::unix::fs::PermissionsExt as _;
        let dir = tempfile::tempdir().unwrap();
        let mode = |p: &Path| std::fs::metadata(p).unwrap().permissions().mode() & 0o777;
        write_readable(&dir.path().join("artifact"), b"a").unwrap();
        write(&dir.path().join("state"), b"s").unwrap();
        assert_eq!(mode(&dir.path().join("artifact")), 0o644);
        assert_eq!(mode(&dir.path().join("state")), 0o600);
    }

    #[test]
    fn a_failed_fill_leaves_the_old_file_and_no_temporary() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("entry");
        write(&path, b"old").unwrap();
        let err = write_with(&path, |f| {
            f.write_all(b"half")?;
            Err(std::io::Error::other("stopped"))
        })
        .unwrap_err();
        assert_eq!(err.to_string(), "stopped");
        assert_eq!(std::fs::read(&path).unwrap(), b"old");
        assert_eq!(std::fs::read_dir(dir.path()).unwrap().count(), 1);
    }
}
