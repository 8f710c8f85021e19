//! The same artifact and rows give the same bits on every run and every
//! instance, including where a NaN's bits could leak into an answer.

use paddock_host::sandbox::model::Isolation;
use paddock_host::{Artifact, Model, ModelOptions, Row, Runtime, RuntimeConfig};
use paddock_tests::{demo_artifact, hostile_module, packed};

#[test]
fn fresh_instances_and_fresh_runtimes_give_identical_bits() {
    let bytes = std::fs::read(demo_artifact("charge-minutes")).unwrap();
    let mut answers = Vec::new();
    for _ in 0..2 {
        let runtime = Runtime::new().unwrap();
        let options = ModelOptions { isolation: Isolation::FreshPerCall, ..ModelOptions::default() };
        let model =
            Model::load_with(&runtime, Artifact::from_bytes(bytes.clone(), u64::MAX).unwrap(), options).unwrap();
        let rows: Vec<Row> = model.artifact().checks().unwrap().unwrap().cases.into_iter().map(|c| c.row).collect();
        for _ in 0..3 {
            let bits: Vec<u64> = model.score(&rows).unwrap().values().iter().map(|v| v.to_bits()).collect();
            answers.push(bits);
        }
    }
    assert!(answers.windows(2).all(|w| w[0] == w[1]));
}

/// A model that answers with the high 32 bits of the NaN that `0/0`
/// produces (a number, so the host lets it through). x86 hardware makes a
/// NaN with the sign bit set (0xfff80000); with canonicalization every
/// machine gives wasmtime's canonical NaN, 0x7ff8000000000000, so the answer
/// is 0x7ff80000 = 2146959360 everywhere.
#[test]
fn nan_bits_cannot_leak_machine_differences() {
    let case = r#"(func $hook_value (param $x f64) (result f64)
      (local $zero f64)
      (local.set $zero (f64.sub (local.get $x) (local.get $x)))
      (f64.convert_i64_u (i64.shr_u (i64.reinterpret_f64 (f64.div (local.get $zero) (local.get $zero))) (i64.const 32))))"#;
    let module = hostile_module(case);
    let canonical = Runtime::new().unwrap();
    let model = Model::load(&canonical, packed(module.as_bytes(), &[], None)).unwrap();
    let answer = model.score(&[Row::new().with("x", 1.0)]).unwrap();
    assert_eq!(answer.values(), &[f64::from(0x7ff8_0000u32)]);

    // Without canonicalization the hardware's own NaN shows through, bit
    // for bit: on x86-64 the "QNaN floating-point indefinite" of SSE
    // division, sign bit set (Intel SDM vol. 1, 4.8.3.7; from memory); on
    // AArch64 the "default NaN", sign clear (Arm ARM, FPCR.DN; from memory).
    #[cfg(target_arch = "x86_64")]
    const HARDWARE: u32 = 0xfff8_0000;
    #[cfg(target_arch = "aarch64")]
    const HARDWARE: u32 = 0x7ff8_0000;
    let loose = Runtime::with_config(RuntimeConfig { canonical_nans: false, ..RuntimeConfig::default() }).unwrap();
    let model = Model::load(&loose, packed(module.as_bytes(), &[], None)).unwrap();
    let raw = model.score(&[Row::new().with("x", 1.0)]).unwrap().values()[0];
    assert_eq!(raw, f64::from(HARDWARE), "hardware NaN's high bits: {:#x}", raw as u64);
    #[cfg(target_arch = "x86_64")]
    assert_ne!(raw, answer.values()[0], "on x86-64 canonicalization must change the bits");
}
