;; expect: load: init trap
;; what: integer division by zero in init
(func $hook_init (param $ptr i32) (param $len i32) (result i32) (drop (i32.div_s (local.get $len) (i32.const 0))) (i32.const 800))
