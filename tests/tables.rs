//! Parquet feature tables as pyarrow writes them (`tests/tables/export.py`,
//! run by `cargo xtask test`): every compression pyarrow offers, every
//! column type a batch job writes, read cell for cell as the CSV beside
//! them (written by Python's csv module from the same values) says.

use std::path::PathBuf;

use paddock_serve::features::{Cell, Table};
use paddock_tests::root;

fn dir() -> PathBuf {
    root().join("target/paddock/tables")
}

fn read(name: &str) -> Table {
    let path = dir().join(name);
    assert!(
        path.exists(),
        "{}: export the tables first: `python3 tests/tables/export.py target/paddock/tables` (needs pyarrow; `cargo xtask test` does it)",
        path.display()
    );
    Table::read(&path, "site", Some("updated_at")).unwrap_or_else(|e| panic!("{e}"))
}

#[test]
fn parquet_in_every_compression_reads_as_the_csv_says() {
    let csv = read("sites.csv");
    let text = std::fs::read_to_string(dir().join("sites.csv")).unwrap();
    let sites: Vec<&str> = text.lines().skip(1).map(|l| l.split(',').next().unwrap()).collect();
    let columns: Vec<String> = csv.columns().map(str::to_owned).collect();
    assert_eq!(columns.len(), 9);
    for compression in ["snappy", "zstd", "gzip", "lz4", "none"] {
        let parquet = read(&format!("sites.{compression}.parquet"));
        assert_eq!(parquet.columns().collect::<Vec<_>>(), columns, "{compression}");
        assert_eq!(parquet.len(), sites.len(), "{compression}");
        for site in &sites {
            for name in &columns {
                let (p, c) = (parquet.column(name).unwrap(), csv.column(name).unwrap());
                assert_eq!(parquet.get(site, p), csv.get(site, c), "{compression}: site `{site}`, column `{name}`");
            }
        }
    }
    // A few cells by hand, from the values export.py writes.
    let t = read("sites.zstd.parquet");
    let at = |site: &str, column: &str| t.get(site, t.column(column).unwrap()).unwrap();
    // 2026-11-29T23:30:15.25Z is 1 795 995 015.25 s after the Unix epoch.
    assert_eq!(at("Market Hall", "occupancy"), (Cell::Absent, Some(1_795_995_015.25)));
    assert_eq!(at("Market Hall", "sessions").0, Cell::Number(9_876_543_210.0));
    assert_eq!(at("Library Green", "tariff"), (Cell::Number(1.05), None));
    assert_eq!(at("Harbour Lot", "fast").0, Cell::Text("true"));
    // 2019-04-02 is day 17 988 of the Unix epoch.
    assert_eq!(at("Harbour Lot", "opened").0, Cell::Number(17_988.0 * 86_400.0));
    assert!(t.get("Nowhere", 0).is_none());
}

#[test]
fn a_column_paddock_cannot_read_is_refused_by_name() {
    let err = Table::read_as(&dir().join("sites.list.parquet"), "tables/sites.list.parquet", "site", None).unwrap_err();
    let text = err.to_string();
    assert!(text.starts_with("tables/sites.list.parquet: row 1, column `history`: a column of type List("), "{text}");
}

#[test]
fn a_damaged_parquet_file_is_refused_and_says_so() {
    let bytes = std::fs::read(dir().join("sites.snappy.parquet")).unwrap();
    let tmp = tempfile::tempdir().unwrap();
    for (name, damaged) in [("cut.parquet", &bytes[..bytes.len() / 2]), ("text.parquet", &b"site,x\na,1\n"[..])] {
        let path = tmp.path().join(name);
        std::fs::write(&path, damaged).unwrap();
        let err = Table::read_as(&path, name, "site", None).unwrap_err().to_string();
        assert!(err.starts_with(&format!("{name}: not a Parquet file: ")), "{err}");
    }
}
