;; expect: pack: componentize
;; what: a core module that imports a host function the world does not have
(import "env" "wall_clock" (func $now (result i64)))
