;; expect: load: contract no_outputs
;; what: declares no outputs
(data (i32.const 1200)
  "\00\01\00\00" "\06\00\00\00"
  "\08\01\00\00" "\05\00\00\00"
  "\00\02\00\00" "\01\00\00\00"
  "\58\02\00\00" "\00\00\00\00"
  "\18\01\00\00" "\10\00\00\00")
(func $hook_describe (result i32) (i32.const 1200))
