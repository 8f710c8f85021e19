;; expect: load: instantiate limit deadline
;; what: a start function that never returns
(func $spin (loop $l (br $l)))
(start $spin)
