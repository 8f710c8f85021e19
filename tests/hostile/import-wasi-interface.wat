;; expect: load: wasi imports wasi:filesystem/preopens@0.2.0
;; what: a component that imports a WASI interface, loaded without a WASI policy
;; kind: component
(component
  (import "wasi:filesystem/preopens@0.2.0" (instance))
)
