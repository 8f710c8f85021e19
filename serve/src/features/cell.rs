//! Keys computed from a position: the H3 cell a latitude and longitude
//! fall in, at a stated resolution (the H3 hexagonal grid, by the `h3o`
//! crate, pure Rust), written as H3 writes a cell: 15 lowercase hex digits.
//!
//! A key template names it as a hole: `{h3(lat, lon, 8)}` — the request's
//! keys `lat` and `lon` (degrees, WGS 84), resolution 8. With `around = k`
//! a lookup reads the cell and every cell within `k` rings of it, and
//! combines what it finds (`combine = "mean"`, `"max"`, `"min"` or `"sum"`).
//!
//! A position that is missing, not a number, or out of range (latitude
//! −90 to 90, longitude −180 to 180) places nothing: the lookup follows
//! its feature's `missing` policy and says why.

use std::collections::BTreeMap;

use h3o::{CellIndex, LatLng, Resolution};

/// A cell hole of a key template: which keys hold the position, and the resolution.
#[derive(Clone, Debug, PartialEq)]
pub struct CellKey {
    lat: String,
    lon: String,
    resolution: Resolution,
}

/// Why a position placed no cell.
#[derive(Clone, Debug, PartialEq, thiserror::Error)]
#[non_exhaustive]
pub enum Unplaced {
    /// The request has no such key.
    #[error("no `{key}` for the position")]
    NoKey {
        /// The key.
        key: String,
    },
    /// The key's value is not a number.
    #[error("{key} `{value}` is not a number")]
    NotANumber {
        /// The key.
        key: String,
        /// Its value.
        value: String,
    },
    /// The number is out of range for a latitude or longitude.
    #[error("{key} {value} is outside {min} to {max} degrees")]
    OutOfRange {
        /// The key.
        key: String,
        /// Its value.
        value: f64,
        /// The least allowed.
        min: f64,
        /// The most allowed.
        max: f64,
    },
}

impl CellKey {
    /// Reads the inside of `h3(LAT, LON, RESOLUTION)`: two of the model's
    /// `keys` and a resolution of 0 to 15.
    ///
    /// # Errors
    /// A message naming what is wrong.
    pub fn parse(args: &str, keys: &[String]) -> Result<CellKey, String> {
        let parts: Vec<&str> = args.split(',').map(str::trim).collect();
        let [lat, lon, resolution] = parts[..] else {
            return Err(format!(
                "h3({args}): give a latitude key, a longitude key and a resolution, as in h3(lat, lon, 8)"
            ));
        };
        for key in [lat, lon] {
            if !keys.iter().any(|k| k == key) {
                return Err(format!(
                    "h3({args}) uses `{key}`, which is not one of the model's keys ({})",
                    keys.join(", ")
                ));
            }
        }
        let resolution = resolution
            .parse::<u8>()
            .ok()
            .and_then(|r| Resolution::try_from(r).ok())
            .ok_or_else(|| format!("h3({args}): resolution `{resolution}` is not 0 to 15"))?;
        Ok(CellKey { lat: lat.to_owned(), lon: lon.to_owned(), resolution })
    }

    /// The hole as written, `h3(lat, lon, 8)`.
    pub fn text(&self) -> String {
        format!("h3({}, {}, {})", self.lat, self.lon, u8::from(self.resolution))
    }

    /// The cell the request's position falls in.
    ///
    /// # Errors
    /// [`Unplaced`] when the position is missing, not a number, or out of range.
    pub fn cell(&self, keys: &BTreeMap<String, String>) -> Result<CellIndex, Unplaced> {
        let degrees = |key: &str, limit: f64| -> Result<f64, Unplaced> {
            let text = keys.get(key).ok_or_else(|| Unplaced::NoKey { key: key.to_owned() })?;
            let value: f64 =
                text.trim().parse().map_err(|_| Unplaced::NotANumber { key: key.to_owned(), value: text.clone() })?;
            if !(-limit..=limit).contains(&value) {
                return Err(Unplaced::OutOfRange { key: key.to_owned(), value, min: -limit, max: limit });
            }
            Ok(value)
        };
        let lat = degrees(&self.lat, 90.0)?;
        let lon = degrees(&self.lon, 180.0)?;
        Ok(cell_of(lat, lon, self.resolution))
    }
}

/// The cell of a position (degrees, within range) at `resolution`.
pub fn cell_of(lat: f64, lon: f64, resolution: Resolution) -> CellIndex {
    LatLng::new(lat, lon).map_or_else(|_| unreachable!("a finite position in range"), |p| p.to_cell(resolution))
}

/// The cell and every cell within `rings` of it (H3's grid disk).
pub fn around(cell: CellIndex, rings: u32) -> Vec<CellIndex> {
    cell.grid_disk::<Vec<_>>(rings)
}

/// How the values found around a cell become one.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
#[non_exhaustive]
pub enum Aggregate {
    /// Their mean.
    Mean,
    /// The largest.
    Max,
    /// The smallest.
    Min,
    /// Their sum.
    Sum,
}

impl Aggregate {
    /// Reads `mean`, `max`, `min` or `sum`.
    ///
    /// # Errors
    /// A message naming the word and the choices.
    pub fn parse(word: &str) -> Result<Aggregate, String> {
        match word {
            "mean" => Ok(Aggregate::Mean),
            "max" => Ok(Aggregate::Max),
            "min" => Ok(Aggregate::Min),
            "sum" => Ok(Aggregate::Sum),
            other => Err(format!("combine = `{other}`: say \"mean\", \"max\", \"min\" or \"sum\"")),
        }
    }

    /// The values combined; `None` for none.
    pub fn apply(self, values: &[f64]) -> Option<f64> {
        if values.is_empty() {
            return None;
        }
        Some(match self {
            Aggregate::Mean => values.iter().sum::<f64>() / values.len() as f64,
            Aggregate::Max => values.iter().copied().fold(f64::NEG_INFINITY, f64::max),
            Aggregate::Min => values.iter().copied().fold(f64::INFINITY, f64::min),
            Aggregate::Sum => values.iter().sum(),
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn keys(lat: &str, lon: &str) -> BTreeMap<String, String> {
        [("lat".to_owned(), lat.to_owned()), ("lon".to_owned(), lon.to_owned())].into()
    }

    #[test]
    fn a_hole_names_two_keys_and_a_resolution() {
        let model = ["lat".to_owned(), "lon".to_owned()];
        let k = CellKey::parse("lat, lon, 9", &model).unwrap();
        assert_eq!(k.text(), "h3(lat, lon, 9)");
        assert_eq!(
            CellKey::parse("lat, lng, 9", &model).unwrap_err(),
            "h3(lat, lng, 9) uses `lng`, which is not one of the model's keys (lat, lon)"
        );
        assert_eq!(
            CellKey::parse("lat, lon, 16", &model).unwrap_err(),
            "h3(lat, lon, 16): resolution `16` is not 0 to 15"
        );
        assert!(CellKey::parse("lat, lon", &model).unwrap_err().contains("as in h3(lat, lon, 8)"));
    }

    #[test]
    fn a_bad_position_says_why() {
        let k = CellKey::parse("lat, lon, 9", &["lat".to_owned(), "lon".to_owned()]).unwrap();
        assert_eq!(k.cell(&keys("95", "0")).unwrap_err().to_string(), "lat 95 is outside -90 to 90 degrees");
        assert_eq!(k.cell(&keys("0", "east")).unwrap_err().to_string(), "lon `east` is not a number");
        assert_eq!(k.cell(&keys("NaN", "0")).unwrap_err().to_string(), "lat NaN is outside -90 to 90 degrees");
        assert_eq!(k.cell(&BTreeMap::new()).unwrap_err().to_string(), "no `lat` for the position");
    }

    #[test]
    fn combining_follows_its_word() {
        let v = [1.0, 4.0, 2.5];
        assert_eq!(Aggregate::parse("mean").unwrap().apply(&v), Some(2.5));
        assert_eq!(Aggregate::parse("max").unwrap().apply(&v), Some(4.0));
        assert_eq!(Aggregate::parse("min").unwrap().apply(&v), Some(1.0));
        assert_eq!(Aggregate::parse("sum").unwrap().apply(&v), Some(7.5));
        assert_eq!(Aggregate::Mean.apply(&[]), None);
        assert!(Aggregate::parse("median").is_err());
    }
}
