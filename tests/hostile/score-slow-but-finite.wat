;; expect: score: limit deadline
;; what: ten billion loop turns: finite, but far past the deadline
(func $hook_score (local $n i64)
  (loop $l
    (local.set $n (i64.add (local.get $n) (i64.const 1)))
    (br_if $l (i64.lt_u (local.get $n) (i64.const 10000000000)))))
