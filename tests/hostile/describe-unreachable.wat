;; expect: load: describe trap
;; what: `unreachable` in describe
(func $hook_describe (result i32) unreachable)
