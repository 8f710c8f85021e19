//! Any bytes as an artifact: parsing, the surface report and the checks
//! section must answer with a value or an error, never a panic.
#![no_main]

use libfuzzer_sys::fuzz_target;
use paddock_host::Artifact;
use paddock_host::artifact::inspect_bytes;

fuzz_target!(|data: &[u8]| {
    let _ = inspect_bytes(data);
    if let Ok(artifact) = Artifact::from_bytes(data.to_vec(), 1 << 20) {
        let _ = artifact.checks();
        let _ = artifact.params();
    }
});
