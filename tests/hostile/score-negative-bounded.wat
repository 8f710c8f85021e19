;; expect: score: output out_of_bounds
;; what: answers -1 for an output declared ≥ 0
(data (i32.const 1400) "\14\01\00\00" "\01\00\00\00")
(data (i32.const 1424) "\01")
(data (i32.const 1456) "\18\01\00\00" "\10\00\00\00")
;; bounds: min = some(0.0), max = none
(data (i32.const 1200)
  "\00\01\00\00" "\06\00\00\00"
  "\08\01\00\00" "\05\00\00\00"
  "\00\02\00\00" "\01\00\00\00"
  "\78\05\00\00" "\01\00\00\00"
  "\18\01\00\00" "\10\00\00\00")
(func $hook_describe (result i32) (i32.const 1200))
(func $hook_value (param $x f64) (result f64) (f64.const -1))
