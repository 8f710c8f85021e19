;; expect: load: describe limit deadline
;; what: endless loop in describe
(func $hook_describe (result i32) (loop $l (br $l)) (i32.const 700))
