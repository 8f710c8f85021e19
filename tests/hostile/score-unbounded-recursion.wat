;; expect: score: limit stack
;; what: unbounded recursion exhausts the stack
(func $down (param $n i32) (result i32) (i32.add (call $down (i32.add (local.get $n) (i32.const 1))) (i32.const 1)))
(func $hook_score (drop (call $down (i32.const 0))))
