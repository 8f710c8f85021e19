;; expect: score: limit memory
;; what: grows memory to exactly the 4 MiB cap (allowed), then one page more
(func $hook_score
  ;; 2 pages + 62 pages = 64 pages = 4 MiB: exactly the cap, which must succeed
  (if (i32.eq (memory.grow (i32.const 62)) (i32.const -1)) (then unreachable))
  (drop (memory.grow (i32.const 1))))
