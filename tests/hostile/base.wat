;; The well-behaved model every hostile case starts from: `affine` 1.0.0,
;; one real feature `x`, one output `y = 2x + 1` (the canonical ABI layouts
;; are explained in tests/fixtures/affine.wat). A case file replaces some of
;; the hooks below; `tests/hostile.rs` splices the case's text in at the
;; marker and keeps the default of every hook the case does not define.
(module
  ;; @case
  (memory (export "memory") 2)
  (table $t 1 funcref)
  (global $bump (mut i32) (i32.const 65536))
  (global $calls (mut i32) (i32.const 0))

  (data (i32.const 256) "affine")
  (data (i32.const 264) "1.0.0")
  (data (i32.const 272) "x")
  (data (i32.const 276) "y")
  (data (i32.const 280) "hand-written WAT")
  (data (i32.const 300) "refused")
  ;; feature `x` at 512, output `y` at 600, contract at 700
  (data (i32.const 512) "\10\01\00\00" "\01\00\00\00")
  (data (i32.const 572) "\01")
  (data (i32.const 576) "\18\01\00\00" "\10\00\00\00")
  (data (i32.const 600) "\14\01\00\00" "\01\00\00\00")
  (data (i32.const 656) "\18\01\00\00" "\10\00\00\00")
  (data (i32.const 700)
    "\00\01\00\00" "\06\00\00\00"
    "\08\01\00\00" "\05\00\00\00"
    "\00\02\00\00" "\01\00\00\00"
    "\58\02\00\00" "\01\00\00\00"
    "\18\01\00\00" "\10\00\00\00")

  (func (export "cabi_realloc") (param $old i32) (param $old_size i32) (param $align i32) (param $size i32) (result i32)
    (local $ptr i32) (local $end i32) (local $have i32)
    (local.set $ptr
      (i32.and
        (i32.add (global.get $bump) (i32.sub (local.get $align) (i32.const 1)))
        (i32.sub (i32.const 0) (local.get $align))))
    (local.set $end (i32.add (local.get $ptr) (local.get $size)))
    (local.set $have (i32.mul (memory.size) (i32.const 65536)))
    (if (i32.gt_u (local.get $end) (local.get $have))
      (then
        (if (i32.eq
              (memory.grow (i32.shr_u (i32.add (i32.sub (local.get $end) (local.get $have)) (i32.const 65535)) (i32.const 16)))
              (i32.const -1))
          (then unreachable))))
    (global.set $bump (local.get $end))
    (local.get $ptr))

  (func (export "init") (param $ptr i32) (param $len i32) (result i32)
    (global.set $bump (i32.const 65536))
    (call $hook_init (local.get $ptr) (local.get $len)))

  (func (export "describe") (result i32)
    (call $hook_describe))

  (func (export "score") (param $rows i32) (param $ptr i32) (param $len i32) (result i32)
    (local $i i32) (local $addr i32)
    (global.set $calls (i32.add (global.get $calls) (i32.const 1)))
    (call $hook_score)
    (block $done
      (loop $each
        (br_if $done (i32.ge_u (local.get $i) (local.get $len)))
        (local.set $addr (i32.add (local.get $ptr) (i32.shl (local.get $i) (i32.const 3))))
        (f64.store (local.get $addr) (call $hook_value (f64.load (local.get $addr))))
        (local.set $i (i32.add (local.get $i) (i32.const 1)))
        (br $each)))
    (global.set $bump (i32.const 65536))
    (i32.store8 (i32.const 832) (i32.const 0))
    (i32.store (i32.const 836) (call $hook_answer_ptr (local.get $ptr)))
    (i32.store (i32.const 840) (call $hook_answer_len (local.get $len)))
    (i32.const 832))
)
;; @defaults
(func $hook_init (param $ptr i32) (param $len i32) (result i32) (i32.const 800))
(func $hook_describe (result i32) (i32.const 700))
(func $hook_score)
(func $hook_value (param $x f64) (result f64) (f64.add (f64.mul (local.get $x) (f64.const 2)) (f64.const 1)))
(func $hook_answer_ptr (param $ptr i32) (result i32) (local.get $ptr))
(func $hook_answer_len (param $len i32) (result i32) (local.get $len))
