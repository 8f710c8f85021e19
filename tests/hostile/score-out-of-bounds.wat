;; expect: score: trap
;; what: a load far outside memory in score
(func $hook_score (drop (f64.load (i32.const 0x10000000))))
