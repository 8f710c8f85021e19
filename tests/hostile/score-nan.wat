;; expect: score: output non_finite
;; what: answers NaN
(func $hook_value (param $x f64) (result f64) (f64.const nan))
