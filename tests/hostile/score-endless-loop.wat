;; expect: score: limit deadline
;; what: endless loop in score
(func $hook_score (loop $l (br $l)))
