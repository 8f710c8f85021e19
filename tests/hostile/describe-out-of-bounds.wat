;; expect: load: describe trap
;; what: a store far outside memory in describe
(func $hook_describe (result i32) (i32.store (i32.const 0x7ffffff0) (i32.const 1)) (i32.const 700))
