//! The artifact file: one WebAssembly component per model version, carrying
//! its parameters and its checks in custom sections of our own naming.
//!
//! This module reads artifacts (size cap, structure, imports, exports, our
//! sections, sha256 identity) and writes them ([`pack`]). It never runs
//! anything: compiling and running are the sandbox's job.

pub mod checks;
pub mod digest;
pub mod profile;
pub mod trust;

use std::fmt;
use std::ops::Range;
use std::path::{Path, PathBuf};
use std::sync::Arc;

use crate::artifact::digest::Digest;
use crate::tool_error::ToolError;
use serde::Serialize;
use wasmparser::{ComponentTypeRef, Encoding, Parser, Payload, TypeBounds};

use crate::artifact::checks::{Checks, ChecksError};
use crate::artifact::profile::{Profile, ProfileError};
use crate::limits::LimitHit;

/// The size cap [`Artifact::read`] and [`Artifact::from_bytes`] are given
/// when nothing says otherwise: 64 MiB. The cap is applied once, when the
/// bytes are read; a loaded [`Artifact`] is within it.
pub const DEFAULT_SIZE_CAP: u64 = 64 << 20;

/// Name of the custom section that carries the parameter blob.
pub const PARAMS_SECTION: &str = "paddock-params";
/// Name of the custom section that carries the checks (JSON, see [`Checks`]).
pub const CHECKS_SECTION: &str = "paddock-checks";
/// Name of the custom section that says where an imported model came from
/// (a JSON object an importer writes: the toolkit, its file, and where each
/// part of the contract came from).
pub const ORIGIN_SECTION: &str = "paddock-origin";
/// Name of the custom section that carries the training profile (JSON, see
/// [`Profile`]).
pub const PROFILE_SECTION: &str = "paddock-profile";
/// Every section name this crate owns starts with this.
const OWN_PREFIX: &str = "paddock-";

/// Why an artifact cannot be read or packed.
#[derive(Debug, thiserror::Error)]
#[non_exhaustive]
pub enum ArtifactError {
    /// The file could not be read.
    #[error("cannot read {path}: {cause}")]
    Io {
        /// The file.
        path: PathBuf,
        /// What the system said.
        cause: std::io::Error,
    },
    /// The file is larger than the configured cap.
    #[error("{0}")]
    TooLarge(LimitHit),
    /// The file is empty.
    #[error("the artifact is empty (0 bytes)")]
    Empty,
    /// The file does not start like WebAssembly.
    #[error("not WebAssembly: the file does not start with the `\\0asm` magic bytes")]
    NotWasm,
    /// A core module where a packed component is expected.
    #[error("this is a core WebAssembly module, not a component: pack it first (`paddock pack`)")]
    CoreModule,
    /// The bytes are not well-formed WebAssembly.
    #[error("malformed WebAssembly at byte {offset}: {message}")]
    Malformed {
        /// Byte offset of the problem.
        offset: usize,
        /// What is wrong.
        message: String,
    },
    /// One of our sections appears more than once.
    #[error("custom section `{name}` appears {count} times; an artifact carries it at most once")]
    DuplicateSection {
        /// Section name.
        name: String,
        /// How many times it appears.
        count: usize,
    },
    /// A section name starts with our prefix but is not one we know.
    #[error("unknown custom section `{name}`: names starting with `{OWN_PREFIX}` are reserved")]
    UnknownSection {
        /// Section name.
        name: String,
    },
    /// The checks section does not parse.
    #[error(transparent)]
    Checks(#[from] ChecksError),
    /// A core module could not be turned into a component.
    #[error("cannot make a component from this module: {0}")]
    Componentize(ToolError),
    /// The origin section is not a JSON object.
    #[error("custom section `{ORIGIN_SECTION}` is not a JSON object: {0}")]
    Origin(serde_json::Error),
    /// The profile section does not parse.
    #[error("custom section `{PROFILE_SECTION}`: {0}")]
    Profile(#[from] ProfileError),
}

/// A top-level custom section: its name and size.
#[derive(Clone, Debug, PartialEq, Eq, Serialize)]
pub struct SectionInfo {
    /// Section name.
    pub name: String,
    /// Size of its contents in bytes.
    pub bytes: usize,
}

/// A parsed artifact, ready to be compiled by the sandbox.
#[derive(Clone)]
pub struct Artifact {
    bytes: Arc<[u8]>,
    digest: Digest,
    params: Option<Range<usize>>,
    checks: Option<Range<usize>>,
    origin: Option<Range<usize>>,
    profile: Option<Range<usize>>,
    sections: Vec<SectionInfo>,
    imports: Vec<String>,
    exports: Vec<String>,
}

impl fmt::Debug for Artifact {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.debug_struct("Artifact")
            .field("digest", &self.digest)
            .field("bytes", &self.bytes.len())
            .field("sections", &self.sections)
            .field("imports", &self.imports)
            .field("exports", &self.exports)
            .finish()
    }
}

impl Artifact {
    /// Reads an artifact file, refusing it before reading when it is larger
    /// than `max_bytes`.
    ///
    /// # Errors
    /// [`ArtifactError::Io`] when the file cannot be read, otherwise as
    /// [`Artifact::from_bytes`].
    pub fn read(path: &Path, max_bytes: u64) -> Result<Self, ArtifactError> {
        use std::io::Read as _;
        let io = |cause| ArtifactError::Io { path: path.to_owned(), cause };
        let file = std::fs::File::open(path).map_err(io)?;
        let size = file.metadata().map_err(io)?.len();
        check_size(size, max_bytes)?;
        // Never more than the cap, even if the file grows after the check.
        let mut bytes = Vec::with_capacity(size as usize);
        file.take(max_bytes.saturating_add(1)).read_to_end(&mut bytes).map_err(io)?;
        Self::from_bytes(bytes, max_bytes)
    }

    /// Parses artifact bytes: size cap, structure, top-level imports,
    /// exports and custom sections.
    ///
    /// # Errors
    /// [`ArtifactError::TooLarge`], [`Empty`](ArtifactError::Empty),
    /// [`NotWasm`](ArtifactError::NotWasm),
    /// [`CoreModule`](ArtifactError::CoreModule),
    /// [`Malformed`](ArtifactError::Malformed), or
    /// [`DuplicateSection`](ArtifactError::DuplicateSection) /
    /// [`UnknownSection`](ArtifactError::UnknownSection) for our own sections.
    pub fn from_bytes(bytes: Vec<u8>, max_bytes: u64) -> Result<Self, ArtifactError> {
        check_size(bytes.len() as u64, max_bytes)?;
        let shape = Shape::of(&bytes)?;
        if shape.encoding == Encoding::Module {
            return Err(ArtifactError::CoreModule);
        }
        let mut params = None;
        let mut checks = None;
        let mut origin = None;
        let mut profile = None;
        for (name, range) in &shape.custom {
            let slot = match name.as_str() {
                PARAMS_SECTION => &mut params,
                CHECKS_SECTION => &mut checks,
                ORIGIN_SECTION => &mut origin,
                PROFILE_SECTION => &mut profile,
                other if other.starts_with(OWN_PREFIX) => {
                    return Err(ArtifactError::UnknownSection { name: other.to_owned() });
                }
                _ => continue,
            };
            if slot.is_some() {
                let count = shape.custom.iter().filter(|(n, _)| n == name).count();
                return Err(ArtifactError::DuplicateSection { name: name.clone(), count });
            }
            *slot = Some(range.clone());
        }
        let sections =
            shape.custom.iter().map(|(name, range)| SectionInfo { name: name.clone(), bytes: range.len() }).collect();
        Ok(Artifact {
            digest: Digest::of(&bytes),
            bytes: bytes.into(),
            params,
            checks,
            origin,
            profile,
            sections,
            imports: shape.imports,
            exports: shape.exports,
        })
    }

    /// The whole file.
    pub fn bytes(&self) -> &[u8] {
        &self.bytes
    }

    /// The sha256 of the whole file: the artifact's identity.
    pub fn digest(&self) -> Digest {
        self.digest
    }

    /// The parameter blob (empty when the artifact carries none).
    pub fn params(&self) -> &[u8] {
        self.params.clone().map_or(&[], |r| &self.bytes[r])
    }

    /// The checks the artifact carries, if any.
    ///
    /// # Errors
    /// [`ArtifactError::Checks`] when the section does not parse.
    pub fn checks(&self) -> Result<Option<Checks>, ArtifactError> {
        Ok(self.checks.clone().map(|r| Checks::from_json(&self.bytes[r])).transpose()?)
    }

    /// Whether the artifact has a checks section (without parsing it).
    pub fn carries_checks(&self) -> bool {
        self.checks.is_some()
    }

    /// The training profile the artifact carries, if any (checked against
    /// the contract when the model loads).
    ///
    /// # Errors
    /// [`ArtifactError::Profile`] when the section does not parse.
    pub fn profile(&self) -> Result<Option<Profile>, ArtifactError> {
        Ok(self.profile.clone().map(|r| Profile::from_json(&self.bytes[r])).transpose()?)
    }

    /// Where an imported model came from, as its importer recorded it.
    ///
    /// # Errors
    /// [`ArtifactError::Origin`] when the section is not a JSON object.
    pub fn origin(&self) -> Result<Option<serde_json::Map<String, serde_json::Value>>, ArtifactError> {
        self.origin.clone().map(|r| serde_json::from_slice(&self.bytes[r]).map_err(ArtifactError::Origin)).transpose()
    }

    /// Top-level custom sections, in file order.
    pub fn sections(&self) -> &[SectionInfo] {
        &self.sections
    }

    /// Names of the component's top-level imports, other than type
    /// definitions (see [`Inventory::type_names`]). A model must have none.
    pub fn imports(&self) -> &[String] {
        &self.imports
    }

    /// Names of the component's top-level exports.
    pub fn exports(&self) -> &[String] {
        &self.exports
    }
}

fn check_size(actual: u64, limit: u64) -> Result<(), ArtifactError> {
    if actual > limit {
        return Err(ArtifactError::TooLarge(LimitHit::ArtifactSize { limit, actual }));
    }
    if actual == 0 {
        return Err(ArtifactError::Empty);
    }
    Ok(())
}

/// What a structural pass over a binary finds at its top level.
struct Shape {
    encoding: Encoding,
    imports: Vec<String>,
    exports: Vec<String>,
    /// Names of the world's own types, imported with an equality bound.
    type_names: Vec<String>,
    /// Top-level custom sections: name and range of their contents.
    custom: Vec<(String, Range<usize>)>,
    /// Linear memories declared by the core modules inside.
    memories: Vec<DeclaredSize>,
    /// Tables declared by the core modules inside.
    tables: Vec<DeclaredSize>,
    /// Data segments in the core modules inside, and their total bytes.
    data: (usize, usize),
}

impl Shape {
    fn of(bytes: &[u8]) -> Result<Shape, ArtifactError> {
        if !bytes.starts_with(b"\0asm") {
            return Err(ArtifactError::NotWasm);
        }
        let malformed = |e: wasmparser::BinaryReaderError| ArtifactError::Malformed {
            offset: e.offset(),
            message: e.message().to_owned(),
        };
        let mut shape = Shape {
            encoding: Encoding::Component,
            imports: vec![],
            exports: vec![],
            type_names: vec![],
            custom: vec![],
            memories: vec![],
            tables: vec![],
            data: (0, 0),
        };
        // Nesting depth: payloads of nested modules and components come
        // inline; only depth 0 is the artifact's own surface.
        let mut depth = 0usize;
        for payload in Parser::new(0).parse_all(bytes) {
            match payload.map_err(malformed)? {
                Payload::Version { encoding, .. } if depth == 0 => shape.encoding = encoding,
                Payload::ModuleSection { .. } | Payload::ComponentSection { .. } => depth += 1,
                Payload::End(_) => depth = depth.saturating_sub(1),
                Payload::MemorySection(reader) => {
                    for m in reader {
                        let m = m.map_err(malformed)?;
                        shape.memories.push(DeclaredSize {
                            initial: m.initial,
                            maximum: m.maximum,
                            unit: "pages of 64 KiB",
                        });
                    }
                }
                Payload::TableSection(reader) => {
                    for t in reader {
                        let t = t.map_err(malformed)?.ty;
                        shape.tables.push(DeclaredSize { initial: t.initial, maximum: t.maximum, unit: "elements" });
                    }
                }
                Payload::DataSection(reader) => {
                    for d in reader {
                        shape.data.0 += 1;
                        shape.data.1 += d.map_err(malformed)?.data.len();
                    }
                }
                _ if depth > 0 => {}
                Payload::ComponentImportSection(reader) => {
                    for import in reader {
                        let import = import.map_err(malformed)?;
                        let name = import.name.name.to_owned();
                        // A type imported with an equality bound is how WIT
                        // names a world's own types: a definition that
                        // grants nothing. Every other import is a capability.
                        match import.ty {
                            ComponentTypeRef::Type(TypeBounds::Eq(_)) => shape.type_names.push(name),
                            _ => shape.imports.push(name),
                        }
                    }
                }
                Payload::ComponentExportSection(reader) => {
                    for export in reader {
                        shape.exports.push(export.map_err(malformed)?.name.name.to_owned());
                    }
                }
                Payload::ImportSection(reader) => {
                    for import in reader.into_imports() {
                        let import = import.map_err(malformed)?;
                        shape.imports.push(format!("{}::{}", import.module, import.name));
                    }
                }
                Payload::ExportSection(reader) => {
                    for export in reader {
                        shape.exports.push(export.map_err(malformed)?.name.to_owned());
                    }
                }
                Payload::CustomSection(reader) => {
                    let start = reader.data_offset();
                    shape.custom.push((reader.name().to_owned(), start..start + reader.data().len()));
                }
                _ => {}
            }
        }
        Ok(shape)
    }
}

/// A declared memory or table size: initial and optional maximum.
#[derive(Clone, Debug, PartialEq, Eq, Serialize)]
pub struct DeclaredSize {
    /// Size at instantiation.
    pub initial: u64,
    /// Largest size the module declares, if any (the host's caps apply too).
    pub maximum: Option<u64>,
    /// What the numbers count.
    pub unit: &'static str,
}

/// What [`inspect_bytes`] reports about any WebAssembly binary.
#[derive(Clone, Debug, Serialize)]
pub struct Inventory {
    /// `component` or `module`.
    pub encoding: &'static str,
    /// Top-level imports (capabilities; a model must have none).
    pub imports: Vec<String>,
    /// Type names the component imports with an equality bound: the
    /// world's own type definitions, which grant nothing.
    pub type_names: Vec<String>,
    /// Top-level exports.
    pub exports: Vec<String>,
    /// Top-level custom sections.
    pub sections: Vec<SectionInfo>,
    /// Linear memories the core modules inside declare.
    pub memories: Vec<DeclaredSize>,
    /// Tables the core modules inside declare.
    pub tables: Vec<DeclaredSize>,
    /// Data segments in the core modules inside.
    pub data_segments: usize,
    /// Bytes of data those segments carry.
    pub data_bytes: usize,
}

/// Reads the surface of any WebAssembly binary, component or core module,
/// without requiring it to be a valid artifact.
///
/// # Errors
/// [`ArtifactError::NotWasm`] or [`ArtifactError::Malformed`].
pub fn inspect_bytes(bytes: &[u8]) -> Result<Inventory, ArtifactError> {
    let shape = Shape::of(bytes)?;
    Ok(Inventory {
        encoding: match shape.encoding {
            Encoding::Component => "component",
            Encoding::Module => "module",
        },
        imports: shape.imports,
        type_names: shape.type_names,
        exports: shape.exports,
        sections: shape
            .custom
            .iter()
            .map(|(name, range)| SectionInfo { name: name.clone(), bytes: range.len() })
            .collect(),
        memories: shape.memories,
        tables: shape.tables,
        data_segments: shape.data.0,
        data_bytes: shape.data.1,
    })
}

/// The contract every model implements, as WIT text.
pub const WIT: &str = include_str!("../../../wit/estimator.wit");

/// What goes into an artifact (see [`pack_imported`]).
#[derive(Clone, Copy, Debug, Default)]
pub struct Parts<'a> {
    /// A component, a core module built for `wasm32-unknown-unknown`, or WebAssembly text.
    pub wasm: &'a [u8],
    /// The parameter blob the model decodes in `init`.
    pub params: Option<&'a [u8]>,
    /// The checks it carries.
    pub checks: Option<&'a Checks>,
    /// An importer's record of where the model came from.
    pub origin: Option<&'a serde_json::Map<String, serde_json::Value>>,
    /// The training profile it carries.
    pub profile: Option<&'a Profile>,
}

/// Makes an artifact: takes a component as it is, or turns a core module
/// built for `wasm32-unknown-unknown` into a component (embedding the
/// `estimator` world first when the module does not carry its own component
/// type, as a hand-written module would not); accepts WebAssembly text too.
/// Drops any of our sections the input already carries, and appends the
/// params and checks.
///
/// # Errors
/// [`ArtifactError::NotWasm`] / [`Malformed`](ArtifactError::Malformed) for
/// bad input, [`ArtifactError::Componentize`] when the module's exports do
/// not fit the world or it does not validate.
pub fn pack(wasm: &[u8], params: Option<&[u8]>, checks: Option<&Checks>) -> Result<Vec<u8>, ArtifactError> {
    pack_imported(Parts { wasm, params, checks, ..Parts::default() })
}

/// As [`pack`], with every part an artifact may carry: also an importer's
/// record of where the model came from (see [`ORIGIN_SECTION`]; `paddock
/// inspect` shows it) and a training profile ([`PROFILE_SECTION`]).
///
/// # Errors
/// As [`pack`].
pub fn pack_imported(parts: Parts<'_>) -> Result<Vec<u8>, ArtifactError> {
    let Parts { wasm, params, checks, origin, profile } = parts;
    let binary;
    let wasm = if wasm.starts_with(b"\0asm") {
        wasm
    } else {
        binary = wat::parse_bytes(wasm).map_err(|e| match std::str::from_utf8(wasm) {
            Ok(_) => ArtifactError::Malformed { offset: 0, message: format!("WebAssembly text does not parse: {e}") },
            Err(_) => ArtifactError::NotWasm,
        })?;
        &binary[..]
    };
    let shape = Shape::of(wasm)?;
    let component = match shape.encoding {
        Encoding::Component => wasm.to_vec(),
        Encoding::Module => {
            let mut module = wasm.to_vec();
            if !shape.custom.iter().any(|(name, _)| name.starts_with("component-type")) {
                embed_world(&mut module)?;
            }
            wit_component::ComponentEncoder::default()
                .module(&module)
                .and_then(|e| e.validate(true).encode())
                .map_err(|e| ArtifactError::Componentize(e.into()))?
        }
    };
    let mut out = strip_own_sections(&component)?;
    if let Some(params) = params {
        append_custom(&mut out, PARAMS_SECTION, params);
    }
    if let Some(checks) = checks {
        append_custom(&mut out, CHECKS_SECTION, &checks.to_json());
    }
    if let Some(origin) = origin {
        let json = serde_json::to_vec(origin).expect("a JSON map serializes");
        append_custom(&mut out, ORIGIN_SECTION, &json);
    }
    if let Some(profile) = profile {
        append_custom(&mut out, PROFILE_SECTION, &profile.to_json());
    }
    Ok(out)
}

/// Embeds the `estimator` world's component type into a core module.
fn embed_world(module: &mut Vec<u8>) -> Result<(), ArtifactError> {
    fn fail(e: wasmtime::anyhow::Error) -> ArtifactError {
        ArtifactError::Componentize(e.into())
    }
    let mut resolve = wit_parser::Resolve::default();
    let package = resolve.push_str("estimator.wit", WIT).map_err(fail)?;
    let world = resolve.select_world(&[package], Some("estimator")).map_err(fail)?;
    wit_component::embed_component_metadata(module, &resolve, world, wit_component::StringEncoding::UTF8).map_err(fail)
}

/// Copies a binary without its top-level `paddock-*` custom sections.
fn strip_own_sections(bytes: &[u8]) -> Result<Vec<u8>, ArtifactError> {
    let malformed = |e: wasmparser::BinaryReaderError| ArtifactError::Malformed {
        offset: e.offset(),
        message: e.message().to_owned(),
    };
    let mut out = bytes[..8].to_vec();
    let mut reader = wasmparser::BinaryReader::new(&bytes[8..], 8);
    while !reader.eof() {
        let start = reader.original_position();
        let id = reader.read_u8().map_err(malformed)?;
        let len = reader.read_var_u32().map_err(malformed)?;
        let body = reader.read_bytes(len as usize).map_err(malformed)?;
        let ours = id == 0
            && wasmparser::BinaryReader::new(body, 0).read_string().is_ok_and(|name| name.starts_with(OWN_PREFIX));
        if !ours {
            out.extend_from_slice(&bytes[start..reader.original_position()]);
        }
    }
    Ok(out)
}

/// Appends a custom section to a module or component.
fn append_custom(out: &mut Vec<u8>, name: &str, data: &[u8]) {
    use wasm_encoder::{Encode as _, Section as _};
    let section = wasm_encoder::CustomSection { name: name.into(), data: data.into() };
    out.push(section.id());
    section.encode(out);
}

#[cfg(test)]
mod tests {
    use super::*;

    const EMPTY_COMPONENT: &[u8] = b"\0asm\x0d\0\x01\0";

    #[test]
    fn pack_appends_and_replaces_our_sections() {
        let once = pack(EMPTY_COMPONENT, Some(b"abc"), None).unwrap();
        let art = Artifact::from_bytes(once.clone(), 1 << 20).unwrap();
        assert_eq!(art.params(), b"abc");
        let twice = pack(&once, Some(b"xyz!"), None).unwrap();
        let art = Artifact::from_bytes(twice, 1 << 20).unwrap();
        assert_eq!(art.params(), b"xyz!");
        assert_eq!(art.sections().len(), 1);
        assert_ne!(art.digest(), Digest::of(&once));
    }

    #[test]
    fn duplicate_sections_are_refused() {
        let mut bytes = EMPTY_COMPONENT.to_vec();
        append_custom(&mut bytes, PARAMS_SECTION, b"a");
        append_custom(&mut bytes, PARAMS_SECTION, b"b");
        let err = Artifact::from_bytes(bytes, 1 << 20).unwrap_err();
        assert_eq!(
            err.to_string(),
            "custom section `paddock-params` appears 2 times; an artifact carries it at most once"
        );
    }

    #[test]
    fn size_cap_and_empty_and_non_wasm_are_named() {
        let err = Artifact::from_bytes(vec![0; 100], 10).unwrap_err();
        assert!(err.to_string().contains("artifact size cap of 10 bytes exceeded (file has 100 bytes)"), "{err}");
        assert!(matches!(Artifact::from_bytes(vec![], 10), Err(ArtifactError::Empty)));
        assert!(matches!(Artifact::from_bytes(b"hello world".to_vec(), 100), Err(ArtifactError::NotWasm)));
    }

    #[test]
    fn a_section_running_past_the_end_is_malformed() {
        let mut bytes = EMPTY_COMPONENT.to_vec();
        append_custom(&mut bytes, PARAMS_SECTION, b"abc");
        bytes.truncate(bytes.len() - 1);
        assert!(matches!(pack(&bytes, None, None), Err(ArtifactError::Malformed { .. })));
    }

    #[test]
    fn sections_of_others_are_kept_byte_for_byte() {
        let mut bytes = EMPTY_COMPONENT.to_vec();
        append_custom(&mut bytes, "producers-of-someone-else", &[7; 300]);
        let packed = pack(&bytes, Some(b"p"), None).unwrap();
        assert_eq!(&packed[..bytes.len()], &bytes[..]);
    }
}
