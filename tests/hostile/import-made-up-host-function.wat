;; expect: load: imports phone-home, read-secrets
;; what: a component that imports two made-up host functions
;; kind: component
(component
  (import "phone-home" (func (param "where" string)))
  (import "read-secrets" (func (result string)))
)
