;; expect: score: trap
;; what: integer division by zero in score
(func $hook_score (drop (i32.rem_s (global.get $calls) (i32.const 0))))
