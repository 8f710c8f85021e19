;; expect: load: init limit deadline
;; what: endless loop in init
(func $hook_init (param $ptr i32) (param $len i32) (result i32) (loop $l (br $l)) (i32.const 800))
