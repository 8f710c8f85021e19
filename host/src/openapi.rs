//! OpenAPI schemas (feature `openapi`) for the core types whose JSON is
//! written by hand: a row, a feature value, a digest. The HTTP surface in
//! `paddock-serve` collects them into its document; the other core types
//! derive theirs.

use utoipa::openapi::RefOr;
use utoipa::openapi::schema::{AdditionalProperties, ObjectBuilder, Type};

#[doc(hidden)]
pub use utoipa;

use crate::artifact::digest::Digest;
use crate::contract::rows::{Row, Value};

/// A schema written by hand for a type whose JSON is written by hand.
#[doc(hidden)]
#[macro_export]
macro_rules! described {
    ($ty:ty, $name:literal, $schema:expr) => {
        impl $crate::openapi::utoipa::PartialSchema for $ty {
            fn schema() -> $crate::openapi::utoipa::openapi::RefOr<$crate::openapi::utoipa::openapi::schema::Schema> {
                $schema.into()
            }
        }

        impl $crate::openapi::utoipa::ToSchema for $ty {
            fn name() -> ::std::borrow::Cow<'static, str> {
                $name.into()
            }
        }
    };
}

fn object() -> ObjectBuilder {
    ObjectBuilder::new()
}

crate::described!(
    Value,
    "FeatureValue",
    object()
        .schema_type(utoipa::openapi::schema::SchemaType::from_iter([
            Type::Number,
            Type::String,
            Type::Boolean,
            Type::Null
        ]))
        .description(Some(
            "A feature value: a number (real or whole), a string (a label), a boolean (a flag), or null (absent)."
        ))
);

crate::described!(
    Row,
    "Row",
    object()
        .schema_type(Type::Object)
        .description(Some("One row: feature name → value. Features left out are absent."))
        .additional_properties(Some(AdditionalProperties::RefOr(RefOr::Ref(utoipa::openapi::Ref::from_schema_name(
            "FeatureValue"
        )))))
);

crate::described!(
    Digest,
    "Digest",
    object()
        .schema_type(Type::String)
        .pattern(Some("^sha256:[0-9a-f]{64}$"))
        .description(Some("An artifact's identity: the sha256 of its bytes."))
);
