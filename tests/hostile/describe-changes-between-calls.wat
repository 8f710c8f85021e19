;; expect: load: contract_unstable
;; what: describe answers version 1.0.0, then 1.0.1
(data (i32.const 1300) "1.0.1")
(data (i32.const 1200)
  "\00\01\00\00" "\06\00\00\00"
  "\14\05\00\00" "\05\00\00\00"
  "\00\02\00\00" "\01\00\00\00"
  "\58\02\00\00" "\01\00\00\00"
  "\18\01\00\00" "\10\00\00\00")
(global $described (mut i32) (i32.const 0))
(func $hook_describe (result i32)
  (global.set $described (i32.add (global.get $described) (i32.const 1)))
  (if (result i32) (i32.eq (global.get $described) (i32.const 1))
    (then (i32.const 700))
    (else (i32.const 1200))))
