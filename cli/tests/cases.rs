//! The `paddock` command, driven by files: every `cli/tests/cases/*.case`
//! names the arguments to run (from the repository's root) and the exact
//! exit code, stdout and stderr they must produce. Add a case by adding a
//! file; when the output changes on purpose, rewrite every file with
//! `PADDOCK_BLESS=1 cargo test -p paddock-cli --test cases` and read the diff.
//!
//! A case file:
//!
//! ```text
//! ;; what: one line for people
//! ;; run: admit /nonexistent/model.wasm
//! ;; exit: 2
//! ---- stdout
//! (exactly what is printed, possibly nothing)
//! ---- stderr
//! error: …
//! ```
//!
//! `;; run:` is split on spaces; an argument of `'…'` keeps its spaces.
//! Cases must not depend on anything built (the demo store, guests): those
//! are covered by `tests/cli.rs`.

use std::path::{Path, PathBuf};
use std::process::Command;

const STDOUT: &str = "---- stdout\n";
const STDERR: &str = "---- stderr\n";

fn root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).parent().unwrap().to_owned()
}

struct Case {
    path: PathBuf,
    header: String,
    args: Vec<String>,
    exit: i32,
    stdout: String,
    stderr: String,
}

fn header<'a>(text: &'a str, key: &str) -> Option<&'a str> {
    text.lines().find_map(|l| l.strip_prefix(&format!(";; {key}: ")))
}

/// Splits `;; run:` into arguments: on spaces, except inside `'…'`.
fn split(line: &str) -> Vec<String> {
    let mut args = Vec::new();
    let mut current = String::new();
    let mut quoted = false;
    for c in line.chars() {
        match c {
            '\'' => quoted = !quoted,
            ' ' if !quoted => {
                if !current.is_empty() {
                    args.push(std::mem::take(&mut current));
                }
            }
            c => current.push(c),
        }
    }
    if !current.is_empty() {
        args.push(current);
    }
    args
}

fn read(path: &Path) -> Case {
    let text = std::fs::read_to_string(path).unwrap();
    let name = path.display();
    let out_at = text.find(STDOUT).unwrap_or_else(|| panic!("{name}: no `{}` line", STDOUT.trim()));
    let err_at = text.find(STDERR).unwrap_or_else(|| panic!("{name}: no `{}` line", STDERR.trim()));
    assert!(out_at < err_at, "{name}: stdout comes before stderr");
    let header_text = &text[..out_at];
    let run = header(header_text, "run").unwrap_or_else(|| panic!("{name}: no `;; run:` line"));
    let exit = header(header_text, "exit").unwrap_or_else(|| panic!("{name}: no `;; exit:` line"));
    Case {
        path: path.to_owned(),
        header: header_text.lines().filter(|l| !l.starts_with(";; exit: ")).map(|l| format!("{l}\n")).collect(),
        args: split(run),
        exit: exit.parse().unwrap_or_else(|_| panic!("{name}: exit {exit:?} is not a number")),
        stdout: text[out_at + STDOUT.len()..err_at].to_owned(),
        stderr: text[err_at + STDERR.len()..].to_owned(),
    }
}

fn cases() -> Vec<Case> {
    let dir = root().join("cli/tests/cases");
    let mut paths: Vec<PathBuf> = std::fs::read_dir(&dir)
        .unwrap()
        .map(|e| e.unwrap().path())
        .filter(|p| p.extension().is_some_and(|e| e == "case"))
        .collect();
    paths.sort();
    paths.iter().map(|p| read(p)).collect()
}

#[test]
fn every_case_prints_and_exits_as_its_file_says() {
    let bless = std::env::var_os("PADDOCK_BLESS").is_some();
    let cases = cases();
    assert!(cases.len() >= 20, "only {} cases found", cases.len());
    let mut wrong = Vec::new();
    for case in &cases {
        let out = Command::new(env!("CARGO_BIN_EXE_paddock"))
            .args(&case.args)
            .current_dir(root())
            .env_remove("PADDOCK_LOG")
            .env("NO_COLOR", "1")
            .output()
            .unwrap();
        let (stdout, stderr) = (String::from_utf8_lossy(&out.stdout), String::from_utf8_lossy(&out.stderr));
        let exit = out.status.code().unwrap_or(-1);
        if bless {
            let text = format!("{};; exit: {exit}\n{STDOUT}{stdout}{STDERR}{stderr}", case.header);
            std::fs::write(&case.path, text).unwrap();
            continue;
        }
        if exit != case.exit || stdout != case.stdout || stderr != case.stderr {
            wrong.push(format!(
                "{}: `paddock {}`\n  exit {exit} (expected {})\n  stdout:\n{stdout}\n  expected stdout:\n{}\n  stderr:\n{stderr}\n  expected stderr:\n{}",
                case.path.display(),
                case.args.join(" "),
                case.exit,
                case.stdout,
                case.stderr,
            ));
        }
    }
    assert!(
        wrong.is_empty(),
        "{} of {} cases differ (PADDOCK_BLESS=1 rewrites them):\n\n{}",
        wrong.len(),
        cases.len(),
        wrong.join("\n\n")
    );
}

/// Every subcommand has its `--help` case, so a new command or flag shows
/// up in review as a changed file.
#[test]
fn every_subcommand_has_a_help_case() {
    let cases = cases();
    let out = Command::new(env!("CARGO_BIN_EXE_paddock")).arg("--help").output().unwrap();
    let help = String::from_utf8_lossy(&out.stdout).into_owned();
    let commands: Vec<&str> = help
        .split("Commands:\n")
        .nth(1)
        .unwrap()
        .lines()
        .take_while(|l| l.starts_with("  "))
        .filter_map(|l| l.split_whitespace().next())
        .filter(|c| *c != "help")
        .collect();
    assert!(commands.len() >= 13, "{help}");
    for c in commands {
        assert!(
            cases.iter().any(|case| case.args == [c, "--help"]),
            "no case runs `paddock {c} --help`: add cli/tests/cases/help-{c}.case"
        );
    }
}

#[test]
fn arguments_split_on_spaces_outside_quotes() {
    assert_eq!(split("voucher 'a b' --dir  x"), ["voucher", "a b", "--dir", "x"]);
}
