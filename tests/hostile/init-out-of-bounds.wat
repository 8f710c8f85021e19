;; expect: load: init trap
;; what: a load far outside memory in init
(func $hook_init (param $ptr i32) (param $len i32) (result i32) (drop (i64.load (i32.const -16))) (i32.const 800))
