;; expect: load: init limit memory
;; what: a 48 MiB params section: lowering it into a 4 MiB memory cap fails
;; params-bytes: 50331648
;; the base model, unchanged: the params are the attack
