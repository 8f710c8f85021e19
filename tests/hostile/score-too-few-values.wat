;; expect: score: output wrong_length
;; what: answers one value fewer than rows × outputs
(func $hook_answer_len (param $len i32) (result i32) (i32.sub (local.get $len) (i32.const 1)))
