//! The library names its own settings in messages (`ModelOptions::wasi`);
//! a person at the command line sets them with flags. [`named`] rewrites
//! each setting a message names as the flag that sets it.

/// Each library setting a message may name, and the flag that sets it.
const SETTINGS: &[(&str, &str)] = &[
    ("`ModelOptions::wasi`", "`--wasi`"),
    ("`RegistryOptions::state_dir`", "`--state DIR`"),
    ("`TrustPolicy::pinned`", "`--pin DIGEST`"),
    ("`Columns::id`", "`--id NAME`"),
    ("`Columns::ignore`", "`--ignore NAME`"),
    ("`InputKind::OnnxGraph`", "`--format onnx-graph --manifest FILE`"),
];

/// `text` with every setting it names replaced by its flag.
pub(crate) fn named(text: &str) -> String {
    SETTINGS.iter().fold(text.to_owned(), |text, (setting, flag)| text.replace(setting, flag))
}

#[cfg(test)]
mod tests {
    /// Every setting in the table is one the libraries name in a message,
    /// so the table cannot drift from them unnoticed.
    #[test]
    fn every_setting_is_named_by_a_library_message() {
        let root = std::path::Path::new(env!("CARGO_MANIFEST_DIR")).parent().unwrap();
        let mut sources = String::new();
        for dir in ["host/src", "serve/src", "import/src"] {
            for entry in walk(&root.join(dir)) {
                sources.push_str(&std::fs::read_to_string(entry).unwrap());
            }
        }
        for (setting, flag) in super::SETTINGS {
            assert!(sources.contains(setting), "no library message names {setting} (mapped to {flag})");
        }
        assert_eq!(
            super::named("the artifact imports wasi:io; load it under a WASI policy (`ModelOptions::wasi`)"),
            "the artifact imports wasi:io; load it under a WASI policy (`--wasi`)"
        );
    }

    fn walk(dir: &std::path::Path) -> Vec<std::path::PathBuf> {
        let mut out = Vec::new();
        for entry in std::fs::read_dir(dir).unwrap() {
            let path = entry.unwrap().path();
            if path.is_dir() {
                out.extend(walk(&path));
            } else if path.extension().is_some_and(|e| e == "rs") {
                out.push(path);
            }
        }
        out
    }
}
