;; expect: score: trap
;; what: claims a list of 2^28 values: far more than its memory holds
(func $hook_answer_len (param $len i32) (result i32) (i32.const 0x10000000))
