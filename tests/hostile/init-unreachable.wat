;; expect: load: init trap
;; what: `unreachable` in init
(func $hook_init (param $ptr i32) (param $len i32) (result i32) unreachable)
