//! A generic tree-ensemble model: its contract and trees are the artifact's
//! params ([`paddock_guest::Packaged`] of [`paddock_guest::TreesParams`]),
//! so this one module serves every boosted or averaged ensemble.

paddock_guest::export!(paddock_guest::Generic<paddock_guest::Trees>);
