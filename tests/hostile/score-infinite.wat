;; expect: score: output non_finite
;; what: answers +infinity
(func $hook_value (param $x f64) (result f64) (f64.const inf))
