//! A generic scoring program: its contract and program (derived fields,
//! predicate trees, regression tables, segments, as a PMML document
//! describes them) are the artifact's params ([`paddock_guest::Packaged`]
//! of [`paddock_guest::ProgramParams`]), so this one module serves every
//! imported PMML model.

paddock_guest::export!(paddock_guest::Generic<paddock_guest::Program>);
