;; expect: score: trap
;; what: answers with a pointer outside its memory
(func $hook_answer_ptr (param $ptr i32) (result i32) (i32.const -64))
