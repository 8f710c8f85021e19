;; expect: score: output wrong_length
;; what: answers one value more than rows × outputs
(func $hook_answer_len (param $len i32) (result i32) (i32.add (local.get $len) (i32.const 1)))
