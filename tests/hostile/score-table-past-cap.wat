;; expect: score: limit table
;; what: grows its table past the 1000-element cap
(func $hook_score (drop (table.grow $t (ref.null func) (i32.const 5000))))
