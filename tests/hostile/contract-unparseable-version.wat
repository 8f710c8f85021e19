;; expect: load: contract bad_version
;; what: version `one`
(data (i32.const 1300) "one")
(data (i32.const 1200)
  "\00\01\00\00" "\06\00\00\00"
  "\14\05\00\00" "\03\00\00\00"
  "\00\02\00\00" "\01\00\00\00"
  "\58\02\00\00" "\01\00\00\00"
  "\18\01\00\00" "\10\00\00\00")
(func $hook_describe (result i32) (i32.const 1200))
