//! A generic linear model: its contract and coefficients are the artifact's
//! params ([`paddock_guest::Packaged`] of [`paddock_guest::LinearParams`]),
//! so this one module serves every linear or logistic model.

paddock_guest::export!(paddock_guest::Generic<paddock_guest::Linear>);
