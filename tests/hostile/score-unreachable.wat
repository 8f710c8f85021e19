;; expect: score: trap
;; what: `unreachable` in score
(func $hook_score unreachable)
