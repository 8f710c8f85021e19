;; expect: load: refused
;; what: init answers err("refused")
(data (i32.const 900) "\01\00\00\00" "\2c\01\00\00" "\07\00\00\00")
(func $hook_init (param $ptr i32) (param $len i32) (result i32) (i32.const 900))
