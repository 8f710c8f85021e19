//! PMML 4.x documents (DMG): `RegressionModel`, `TreeModel` and
//! `MiningModel` segmentations, with their `MiningSchema`, `Targets`,
//! `Output` fields for model chains, and derived fields, compiled to a
//! [`ProgramParams`] the program guest evaluates.
//!
//! Field names become slots and categorical labels become indices here, at
//! pack time: the guest sees numbers only. The `DataDictionary` gives the
//! contract: categorical and ordinal `Value`s a label domain, `Interval`s
//! bounds, integer types whole numbers, booleans flags.
//!
//! Anything the program does not reproduce is refused naming the element
//! and its line.

use std::collections::HashMap;

use paddock_guest::{
    Bounds, Cast, Compare, Contract, Emit, Ensemble, Expr, Feature, Function, Input, Interval, Kind, Logic, Normalize,
    Outliers, Output, Predicate, ProgramParams, RegressionTable, Rescale, Segment, Submodel, TreeNode, WhenUnknown,
};
use roxmltree::{Document, Node};

use crate::{Blame, EstimatorParams, Format, ImportError, Imported, Origin, Provenance};

/// Deepest nesting of models, predicates and expressions imported (the
/// program's own limit).
const MAX_DEPTH: usize = paddock_guest::PROGRAM_MAX_DEPTH;

/// A label that is in no list: compares unequal to every label index.
const NO_LABEL: f64 = -1.0;

/// What a name in scope stands for.
#[derive(Clone, Debug)]
struct Field {
    slot: u32,
    /// The labels of a categorical field (its values are their indices).
    labels: Option<Vec<String>>,
    /// Whether the labels are ordered (ordinal), so `<` compares them.
    ordinal: bool,
}

/// The reader: the document, the file's name for messages, and the slots.
struct Reader<'a, 'input> {
    doc: &'a Document<'input>,
    blame: Blame<'a>,
    slots: u32,
    /// The DataDictionary, by name.
    dictionary: HashMap<String, DataField>,
}

/// A field of the DataDictionary.
#[derive(Clone, Debug)]
struct DataField {
    optype: String,
    data_type: String,
    /// Valid values (categorical, ordinal), in document order.
    values: Vec<String>,
    intervals: Vec<Interval>,
    line: u32,
}

/// Names in scope, innermost last.
#[derive(Clone, Debug, Default)]
struct Scope {
    frames: Vec<HashMap<String, Field>>,
}

impl Scope {
    fn get(&self, name: &str) -> Option<&Field> {
        self.frames.iter().rev().find_map(|f| f.get(name))
    }

    fn define(&mut self, name: &str, field: Field) {
        if self.frames.is_empty() {
            self.frames.push(HashMap::new());
        }
        self.frames.last_mut().expect("a frame").insert(name.to_owned(), field);
    }
}

fn elements<'a, 'input>(node: Node<'a, 'input>) -> impl Iterator<Item = Node<'a, 'input>> {
    node.children().filter(|c| c.is_element() && c.tag_name().name() != "Extension")
}

fn child<'a, 'input>(node: Node<'a, 'input>, name: &str) -> Option<Node<'a, 'input>> {
    elements(node).find(|c| c.tag_name().name() == name)
}

fn tag<'a>(node: Node<'a, '_>) -> &'a str {
    node.tag_name().name()
}

const PREDICATES: [&str; 5] = ["SimplePredicate", "CompoundPredicate", "SimpleSetPredicate", "True", "False"];
const MODELS: [&str; 3] = ["RegressionModel", "TreeModel", "MiningModel"];
const EXPRESSIONS: [&str; 7] =
    ["Constant", "FieldRef", "NormContinuous", "NormDiscrete", "Discretize", "MapValues", "Apply"];

impl<'a, 'input> Reader<'a, 'input> {
    fn place(&self, node: Node<'_, '_>) -> String {
        let line = self.doc.text_pos_at(node.range().start).row;
        format!("line {line} <{}>", tag(node))
    }

    fn malformed(&self, node: Node<'_, '_>, problem: impl Into<String>) -> ImportError {
        self.blame.malformed(&self.place(node), problem)
    }

    fn unsupported(&self, node: Node<'_, '_>, what: impl Into<String>, instead: &str) -> ImportError {
        self.blame.unsupported(&self.place(node), what, instead)
    }

    fn attr<'n>(&self, node: Node<'n, '_>, name: &str) -> Result<&'n str, ImportError> {
        node.attribute(name).ok_or_else(|| self.malformed(node, format!("no `{name}` attribute")))
    }

    fn number(&self, node: Node<'_, '_>, name: &str, default: Option<f64>) -> Result<f64, ImportError> {
        match (node.attribute(name), default) {
            (None, Some(d)) => Ok(d),
            (None, None) => Err(self.malformed(node, format!("no `{name}` attribute"))),
            (Some(text), _) => {
                parse_number(text).ok_or_else(|| self.malformed(node, format!("`{name}=\"{text}\"` is not a number")))
            }
        }
    }

    fn new_slot(&mut self, node: Node<'_, '_>) -> Result<u32, ImportError> {
        if self.slots >= 1 << 20 {
            return Err(self.unsupported(node, "more than a million fields", "simplify the document"));
        }
        self.slots += 1;
        Ok(self.slots - 1)
    }

    /// The value a text takes in a field: a label's index, a boolean's 0 or
    /// 1, or a number.
    fn value_of(&self, node: Node<'_, '_>, field: &Field, text: &str) -> Result<f64, ImportError> {
        if let Some(labels) = &field.labels {
            return Ok(labels.iter().position(|l| l == text).map_or(NO_LABEL, |i| i as f64));
        }
        match text.trim() {
            "true" => Ok(1.0),
            "false" => Ok(0.0),
            t => parse_number(t)
                .ok_or_else(|| self.malformed(node, format!("`{text}` is not a number, and the field has no labels"))),
        }
    }

    fn field<'s>(&self, node: Node<'_, '_>, scope: &'s Scope, name: &str) -> Result<&'s Field, ImportError> {
        scope.get(name).ok_or_else(|| {
            self.malformed(
                node,
                format!("field `{name}` is not defined here (not an active field, derived field or earlier output)"),
            )
        })
    }

    // ---- predicates ----

    fn predicate(&self, node: Node<'_, '_>, scope: &Scope, depth: usize) -> Result<Predicate, ImportError> {
        if depth > MAX_DEPTH {
            return Err(self.unsupported(
                node,
                format!("predicates nested deeper than {MAX_DEPTH}"),
                "flatten the predicate",
            ));
        }
        Ok(match tag(node) {
            "True" => Predicate::True,
            "False" => Predicate::False,
            "SimplePredicate" => {
                let field = self.field(node, scope, self.attr(node, "field")?)?;
                let op = self.attr(node, "operator")?;
                let compare = match op {
                    "isMissing" => return Ok(Predicate::IsMissing(field.slot)),
                    "isNotMissing" => return Ok(Predicate::IsNotMissing(field.slot)),
                    other => comparison(other).ok_or_else(|| self.malformed(node, format!("operator `{other}`")))?,
                };
                if field.labels.is_some() && !field.ordinal && !matches!(compare, Compare::Equal | Compare::NotEqual) {
                    return Err(self.unsupported(
                        node,
                        format!("`{op}` on a categorical field"),
                        "declare the field ordinal, or compare with equal/notEqual",
                    ));
                }
                let value = self.value_of(node, field, self.attr(node, "value")?)?;
                Predicate::Compare { field: field.slot, op: compare, value }
            }
            "SimpleSetPredicate" => {
                let field = self.field(node, scope, self.attr(node, "field")?)?;
                let negate = match self.attr(node, "booleanOperator")? {
                    "isIn" => false,
                    "isNotIn" => true,
                    other => return Err(self.malformed(node, format!("booleanOperator `{other}`"))),
                };
                let array = child(node, "Array").ok_or_else(|| self.malformed(node, "no <Array>"))?;
                let values = array_items(array.text().unwrap_or(""))
                    .iter()
                    .map(|t| self.value_of(array, field, t))
                    .collect::<Result<Vec<_>, _>>()?;
                Predicate::InSet { field: field.slot, values, negate }
            }
            "CompoundPredicate" => {
                let combine = match self.attr(node, "booleanOperator")? {
                    "and" => Logic::And,
                    "or" => Logic::Or,
                    "xor" => Logic::Xor,
                    "surrogate" => Logic::Surrogate,
                    other => return Err(self.malformed(node, format!("booleanOperator `{other}`"))),
                };
                let parts =
                    elements(node).map(|p| self.predicate(p, scope, depth + 1)).collect::<Result<Vec<_>, _>>()?;
                if parts.len() < 2 {
                    return Err(self.malformed(node, "a compound predicate needs two parts or more"));
                }
                Predicate::Compound { combine, parts }
            }
            other => {
                return Err(self.unsupported(
                    node,
                    format!("predicate <{other}>"),
                    "use SimplePredicate, CompoundPredicate, SimpleSetPredicate, True or False",
                ));
            }
        })
    }

    fn predicate_of(&self, node: Node<'_, '_>, scope: &Scope) -> Result<Predicate, ImportError> {
        let p = elements(node)
            .find(|c| PREDICATES.contains(&tag(*c)))
            .ok_or_else(|| self.malformed(node, "no predicate"))?;
        self.predicate(p, scope, 0)
    }

    // ---- derived fields ----

    /// Defines the derived fields of a `TransformationDictionary` or
    /// `LocalTransformations`, in order, returning their computations.
    fn derived_fields(
        &mut self,
        node: Option<Node<'_, '_>>,
        scope: &mut Scope,
    ) -> Result<Vec<(u32, Expr)>, ImportError> {
        let Some(node) = node else { return Ok(Vec::new()) };
        let mut out = Vec::new();
        for d in elements(node) {
            match tag(d) {
                "DerivedField" => {}
                "DefineFunction" => {
                    return Err(self.unsupported(
                        d,
                        "user-defined functions",
                        "inline the function in each DerivedField",
                    ));
                }
                other => return Err(self.unsupported(d, format!("<{other}>"), "use DerivedField elements")),
            }
            let name = self.attr(d, "name")?;
            let e = elements(d).find(|c| {
                EXPRESSIONS.contains(&tag(*c)) || tag(*c) == "Aggregate" || tag(*c) == "Lag" || tag(*c) == "TextIndex"
            });
            let e = e.ok_or_else(|| self.malformed(d, "no expression"))?;
            let (expr, labels) = self.expr(e, scope, 0)?;
            let categorical = matches!(d.attribute("optype"), Some("categorical" | "ordinal"))
                || d.attribute("dataType") == Some("string");
            let labels = if categorical { labels } else { None };
            let slot = self.new_slot(d)?;
            scope.define(name, Field { slot, labels, ordinal: d.attribute("optype") == Some("ordinal") });
            out.push((slot, expr));
        }
        Ok(out)
    }

    /// An expression, and the labels of its values when they are text.
    fn expr(
        &self,
        node: Node<'_, '_>,
        scope: &Scope,
        depth: usize,
    ) -> Result<(Expr, Option<Vec<String>>), ImportError> {
        if depth > MAX_DEPTH {
            return Err(self.unsupported(
                node,
                format!("expressions nested deeper than {MAX_DEPTH}"),
                "split it into derived fields",
            ));
        }
        let missing = |s: &Self| s.number(node, "mapMissingTo", Some(f64::NAN));
        Ok(match tag(node) {
            "Constant" => {
                if node.attribute("missing") == Some("true") {
                    return Ok((Expr::Constant(f64::NAN), None));
                }
                let text = node.text().unwrap_or("").trim();
                match parse_number(text) {
                    Some(v) => (Expr::Constant(v), None),
                    None => (Expr::Constant(0.0), Some(vec![text.to_owned()])),
                }
            }
            "FieldRef" => {
                let field = self.field(node, scope, self.attr(node, "field")?)?;
                if node.attribute("mapMissingTo").is_some() {
                    let m = missing(self)?;
                    let e = Expr::Apply {
                        function: Function::If,
                        args: vec![
                            Expr::Apply {
                                function: Function::IsMissing,
                                args: vec![Expr::Field(field.slot)],
                                missing: f64::NAN,
                                default: f64::NAN,
                            },
                            Expr::Constant(m),
                            Expr::Field(field.slot),
                        ],
                        missing: f64::NAN,
                        default: f64::NAN,
                    };
                    (e, field.labels.clone())
                } else {
                    (Expr::Field(field.slot), field.labels.clone())
                }
            }
            "NormContinuous" => {
                let field = self.field(node, scope, self.attr(node, "field")?)?;
                let mut points = Vec::new();
                for p in elements(node).filter(|c| tag(*c) == "LinearNorm") {
                    points.push((self.number(p, "orig", None)?, self.number(p, "norm", None)?));
                }
                if points.len() < 2 || points.windows(2).any(|w| !(w[0].0 < w[1].0)) {
                    return Err(self.malformed(node, "needs two LinearNorm points or more, orig increasing"));
                }
                let outliers = match node.attribute("outliers").unwrap_or("asIs") {
                    "asIs" => Outliers::AsIs,
                    "asMissingValues" => Outliers::AsMissing { low: points[0].0, high: points[points.len() - 1].0 },
                    "asExtremeValues" => Outliers::AsExtremes { low: points[0].1, high: points[points.len() - 1].1 },
                    other => return Err(self.malformed(node, format!("outliers `{other}`"))),
                };
                (Expr::Norm { field: field.slot, points, outliers, missing: missing(self)? }, None)
            }
            "NormDiscrete" => {
                let field = self.field(node, scope, self.attr(node, "field")?)?;
                let value = self.value_of(node, field, self.attr(node, "value")?)?;
                (Expr::Indicator { field: field.slot, value, missing: missing(self)? }, None)
            }
            "Discretize" => {
                let field = self.field(node, scope, self.attr(node, "field")?)?;
                let mut labels = Labels::default();
                let mut bins = Vec::new();
                for b in elements(node).filter(|c| tag(*c) == "DiscretizeBin") {
                    let interval =
                        self.interval(child(b, "Interval").ok_or_else(|| self.malformed(b, "no <Interval>"))?)?;
                    bins.push((interval, labels.value(self.attr(b, "binValue")?)));
                }
                let default = node.attribute("defaultValue").map_or(f64::NAN, |t| labels.value(t));
                let m = node.attribute("mapMissingTo").map_or(f64::NAN, |t| labels.value(t));
                (Expr::Bins { field: field.slot, bins, missing: m, default }, labels.finish())
            }
            "MapValues" => {
                let output = self.attr(node, "outputColumn")?;
                let pairs: Vec<(&Field, &str)> = elements(node)
                    .filter(|c| tag(*c) == "FieldColumnPair")
                    .map(|p| Ok((self.field(p, scope, self.attr(p, "field")?)?, self.attr(p, "column")?)))
                    .collect::<Result<_, ImportError>>()?;
                if pairs.is_empty() {
                    return Err(self.malformed(node, "no FieldColumnPair"));
                }
                let table = child(node, "InlineTable")
                    .ok_or_else(|| self.unsupported(node, "a table other than an InlineTable", "inline the table"))?;
                let mut labels = Labels::default();
                let mut rows = Vec::new();
                for row in elements(table).filter(|c| tag(*c) == "row") {
                    let cell = |column: &str| {
                        elements(row).find(|c| tag(*c) == column).map(|c| c.text().unwrap_or("").trim().to_owned())
                    };
                    let Some(out) = cell(output) else { continue };
                    let mut keys = Vec::with_capacity(pairs.len());
                    for (field, column) in &pairs {
                        let text = cell(column).ok_or_else(|| self.malformed(row, format!("no `{column}` cell")))?;
                        keys.push(self.value_of(row, field, &text)?);
                    }
                    rows.extend(keys);
                    rows.push(labels.value(&out));
                }
                let default = node.attribute("defaultValue").map_or(f64::NAN, |t| labels.value(t));
                let m = node.attribute("mapMissingTo").map_or(f64::NAN, |t| labels.value(t));
                (
                    Expr::Lookup { fields: pairs.iter().map(|(f, _)| f.slot).collect(), rows, missing: m, default },
                    labels.finish(),
                )
            }
            "Apply" => {
                let name = self.attr(node, "function")?;
                let function = match name {
                    c if comparison(c).is_some() => Function::Compare(comparison(c).expect("just matched")),
                    "+" => Function::Add,
                    "-" => Function::Subtract,
                    "*" => Function::Multiply,
                    "/" => Function::Divide,
                    "min" => Function::Min,
                    "max" => Function::Max,
                    "sum" => Function::Sum,
                    "avg" => Function::Avg,
                    "log10" => Function::Log10,
                    "ln" => Function::Ln,
                    "sqrt" => Function::Sqrt,
                    "abs" => Function::Abs,
                    "exp" => Function::Exp,
                    "pow" => Function::Pow,
                    "threshold" => Function::Threshold,
                    "floor" => Function::Floor,
                    "ceil" => Function::Ceil,
                    "round" => Function::Round,
                    "isMissing" => Function::IsMissing,
                    "isNotMissing" => Function::IsNotMissing,
                    "and" => Function::And,
                    "or" => Function::Or,
                    "not" => Function::Not,
                    "if" => Function::If,
                    other => {
                        return Err(self.unsupported(
                            node,
                            format!("function `{other}`"),
                            "use arithmetic, comparison, logical or rounding functions",
                        ));
                    }
                };
                if node.attribute("invalidValueTreatment").is_some_and(|t| t != "returnInvalid") {
                    return Err(self.unsupported(node, "invalidValueTreatment on Apply", "leave it at returnInvalid"));
                }
                let mut args = Vec::new();
                let mut arg_labels = Vec::new();
                for a in elements(node) {
                    let (e, l) = self.expr(a, scope, depth + 1)?;
                    args.push(e);
                    arg_labels.push(l);
                }
                // A text constant compared with a categorical field: its label's index.
                if matches!(function, Function::Compare(Compare::Equal | Compare::NotEqual)) && args.len() == 2 {
                    for (c, f) in [(0, 1), (1, 0)] {
                        if let (Expr::Constant(_), Some([text]), Some(labels)) =
                            (&args[c], arg_labels[c].as_deref(), &arg_labels[f])
                        {
                            args[c] =
                                Expr::Constant(labels.iter().position(|l| l == text).map_or(NO_LABEL, |i| i as f64));
                        }
                    }
                } else if let Some(text) =
                    arg_labels.iter().flatten().find(|l| l.len() == 1 && !matches!(function, Function::If))
                {
                    return Err(self.unsupported(
                        node,
                        format!("text `{}` in function `{name}`", text[0]),
                        "compute with numbers",
                    ));
                }
                let default = self.number(node, "defaultValue", Some(f64::NAN))?;
                (Expr::Apply { function, args, missing: missing(self)?, default }, None)
            }
            other => {
                return Err(self.unsupported(
                    node,
                    format!("expression <{other}>"),
                    "use Constant, FieldRef, NormContinuous, NormDiscrete, Discretize, MapValues or Apply",
                ));
            }
        })
    }

    fn interval(&self, node: Node<'_, '_>) -> Result<Interval, ImportError> {
        let (low_closed, high_closed) = match self.attr(node, "closure")? {
            "openOpen" => (false, false),
            "openClosed" => (false, true),
            "closedOpen" => (true, false),
            "closedClosed" => (true, true),
            other => return Err(self.malformed(node, format!("closure `{other}`"))),
        };
        let low = self.number(node, "leftMargin", Some(f64::NEG_INFINITY))?;
        let high = self.number(node, "rightMargin", Some(f64::INFINITY))?;
        if low > high {
            return Err(self.malformed(node, format!("leftMargin {low} is above rightMargin {high}")));
        }
        Ok(Interval { low, high, low_closed, high_closed })
    }

    // ---- models ----

    /// The class labels of a classification model whose target is `target`.
    fn classes(
        &self,
        node: Node<'_, '_>,
        target: Option<&str>,
        found: impl FnOnce() -> Vec<String>,
    ) -> Result<Vec<String>, ImportError> {
        if let Some(d) = target.and_then(|t| self.dictionary.get(t))
            && !d.values.is_empty()
        {
            return Ok(d.values.clone());
        }
        let found = found();
        if found.is_empty() {
            return Err(self.malformed(
                node,
                "a classification model with no classes (list the target's Values in the DataDictionary)",
            ));
        }
        Ok(found)
    }

    fn target_of(&self, model: Node<'_, '_>) -> Option<String> {
        if let Some(t) = model.attribute("targetFieldName") {
            return Some(t.to_owned());
        }
        let schema = child(model, "MiningSchema")?;
        elements(schema)
            .find(|f| matches!(f.attribute("usageType"), Some("target" | "predicted")))
            .and_then(|f| f.attribute("name"))
            .map(str::to_owned)
    }

    /// A model element, with `classes` the class labels when the caller has
    /// fixed them (a segment of an ensemble).
    fn model(
        &mut self,
        node: Node<'_, '_>,
        scope: &mut Scope,
        classes: Option<&[String]>,
        depth: usize,
    ) -> Result<(Submodel, Vec<String>), ImportError> {
        if depth > MAX_DEPTH {
            return Err(self.unsupported(
                node,
                format!("models nested deeper than {MAX_DEPTH}"),
                "flatten the ensemble",
            ));
        }
        let function = self.attr(node, "functionName")?;
        let classification = match function {
            "regression" => false,
            "classification" => true,
            other => {
                return Err(self.unsupported(
                    node,
                    format!("functionName `{other}`"),
                    "export a regression or classification model",
                ));
            }
        };
        if let Some(schema) = child(node, "MiningSchema")
            && depth > 0
        {
            for f in elements(schema) {
                if ["missingValueReplacement", "outliers", "lowValue", "highValue"]
                    .iter()
                    .any(|a| f.attribute(*a).is_some())
                    || f.attribute("invalidValueTreatment").is_some_and(|t| t != "returnInvalid")
                {
                    return Err(self.unsupported(
                        f,
                        "value treatment in a nested model's MiningSchema",
                        "treat values in the outermost model's MiningSchema",
                    ));
                }
            }
        }
        scope.frames.push(HashMap::new());
        let derived = self.derived_fields(child(node, "LocalTransformations"), scope)?;
        let target = self.target_of(node);
        let (kind, labels) = match tag(node) {
            "RegressionModel" => self.regression(node, scope, classification, target.as_deref(), classes)?,
            "TreeModel" => self.tree(node, scope, classification, target.as_deref(), classes)?,
            "MiningModel" => self.mining(node, scope, classification, target.as_deref(), classes, depth)?,
            other => {
                return Err(self.unsupported(
                    node,
                    format!("model <{other}>"),
                    "export a RegressionModel, TreeModel or MiningModel",
                ));
            }
        };
        let rescale = self.targets(node, classification)?;
        // Output fields a later segment of a chain reads; each may use the
        // ones before it.
        let mut passes = Vec::new();
        let mut after = Vec::new();
        let mut outputs = Vec::new();
        if let Some(output) = child(node, "Output") {
            for f in elements(output).filter(|c| tag(*c) == "OutputField") {
                let name = self.attr(f, "name")?;
                let emit = match f.attribute("feature").unwrap_or("predictedValue") {
                    "transformedValue" => {
                        let e = elements(f)
                            .find(|c| EXPRESSIONS.contains(&tag(*c)))
                            .ok_or_else(|| self.malformed(f, "a transformedValue with no expression"))?;
                        let (expr, _) = self.expr(e, scope, 0)?;
                        let slot = self.new_slot(f)?;
                        after.push((slot, expr));
                        scope.define(name, Field { slot, labels: None, ordinal: false });
                        outputs.push((name.to_owned(), slot));
                        continue;
                    }
                    "predictedValue" if !classification => Emit::Value,
                    "probability" if classification => {
                        let value = match f.attribute("value") {
                            Some(v) => v,
                            None => continue,
                        };
                        let k = labels
                            .iter()
                            .position(|l| l == value)
                            .ok_or_else(|| self.malformed(f, format!("class `{value}` is not one of the model's")))?;
                        Emit::Probability(k as u32)
                    }
                    // Predicted labels and other features are for people; not passed on.
                    _ => continue,
                };
                let slot = self.new_slot(f)?;
                passes.push((slot, emit));
                scope.define(name, Field { slot, labels: None, ordinal: false });
                outputs.push((name.to_owned(), slot));
            }
        }
        scope.frames.pop();
        for (name, slot) in outputs {
            scope.define(&name, Field { slot, labels: None, ordinal: false });
        }
        let classes_count = if classification { labels.len() as u32 } else { 0 };
        Ok((Submodel { derived, kind, classes: classes_count, rescale, passes, after }, labels))
    }

    fn targets(&self, node: Node<'_, '_>, classification: bool) -> Result<Option<Rescale>, ImportError> {
        let Some(targets) = child(node, "Targets") else { return Ok(None) };
        let mut out = None;
        for t in elements(targets) {
            if let Some(v) =
                elements(t).find(|v| v.attribute("priorProbability").is_some() || v.attribute("defaultValue").is_some())
            {
                return Err(self.unsupported(
                    v,
                    "TargetValue priors and defaults",
                    "remove them; the model's own prediction is used",
                ));
            }
            if classification {
                continue;
            }
            let cast = match t.attribute("castInteger") {
                None => Cast::None,
                Some("round") => Cast::Round,
                Some("ceiling") => Cast::Ceiling,
                Some("floor") => Cast::Floor,
                Some(other) => return Err(self.malformed(t, format!("castInteger `{other}`"))),
            };
            out = Some(Rescale {
                min: self.number(t, "min", Some(f64::NEG_INFINITY))?,
                max: self.number(t, "max", Some(f64::INFINITY))?,
                factor: self.number(t, "rescaleFactor", Some(1.0))?,
                constant: self.number(t, "rescaleConstant", Some(0.0))?,
                cast,
            });
        }
        Ok(out)
    }

    fn regression(
        &mut self,
        node: Node<'_, '_>,
        scope: &Scope,
        classification: bool,
        target: Option<&str>,
        fixed: Option<&[String]>,
    ) -> Result<(Kind, Vec<String>), ImportError> {
        let normalize = match node.attribute("normalizationMethod").unwrap_or("none") {
            "none" => Normalize::None,
            "softmax" => Normalize::Softmax,
            "logit" => Normalize::Logit,
            "probit" => Normalize::Probit,
            "cloglog" => Normalize::Cloglog,
            "loglog" => Normalize::Loglog,
            "cauchit" => Normalize::Cauchit,
            "exp" => Normalize::Exp,
            "simplemax" => Normalize::Simplemax,
            other => {
                return Err(self.unsupported(
                    node,
                    format!("normalizationMethod `{other}`"),
                    "use none, softmax, logit, probit, cloglog, loglog, cauchit, exp or simplemax",
                ));
            }
        };
        let tables_nodes: Vec<Node<'_, '_>> = elements(node).filter(|c| tag(*c) == "RegressionTable").collect();
        if tables_nodes.is_empty() {
            return Err(self.malformed(node, "no RegressionTable"));
        }
        let labels = if classification {
            let found =
                || tables_nodes.iter().filter_map(|t| t.attribute("targetCategory").map(str::to_owned)).collect();
            match fixed {
                Some(f) => f.to_vec(),
                None => self.classes(node, target, found)?,
            }
        } else {
            Vec::new()
        };
        let mut tables = Vec::new();
        for t in &tables_nodes {
            let mut table = RegressionTable {
                intercept: self.number(*t, "intercept", None)?,
                numeric: Vec::new(),
                categorical: Vec::new(),
                products: Vec::new(),
                class: 0,
            };
            if classification {
                let category = self.attr(*t, "targetCategory")?;
                table.class = labels.iter().position(|l| l == category).ok_or_else(|| {
                    self.malformed(*t, format!("targetCategory `{category}` is not one of the classes"))
                })? as u32;
            }
            for p in elements(*t) {
                match tag(p) {
                    "NumericPredictor" => {
                        let field = self.field(p, scope, self.attr(p, "name")?)?;
                        table.numeric.push((
                            field.slot,
                            self.number(p, "exponent", Some(1.0))?,
                            self.number(p, "coefficient", None)?,
                        ));
                    }
                    "CategoricalPredictor" => {
                        let field = self.field(p, scope, self.attr(p, "name")?)?;
                        let value = self.value_of(p, field, self.attr(p, "value")?)?;
                        table.categorical.push((field.slot, value, self.number(p, "coefficient", None)?));
                    }
                    "PredictorTerm" => {
                        let fields = elements(p)
                            .filter(|c| tag(*c) == "FieldRef")
                            .map(|f| Ok(self.field(f, scope, self.attr(f, "field")?)?.slot))
                            .collect::<Result<Vec<_>, ImportError>>()?;
                        table.products.push((fields, self.number(p, "coefficient", None)?));
                    }
                    other => {
                        return Err(self.unsupported(
                            p,
                            format!("<{other}> in a RegressionTable"),
                            "use NumericPredictor, CategoricalPredictor or PredictorTerm",
                        ));
                    }
                }
            }
            tables.push(table);
        }
        if classification && tables.len() != labels.len() {
            return Err(self.unsupported(
                node,
                format!("{} tables for {} classes", tables.len(), labels.len()),
                "give one RegressionTable per class",
            ));
        }
        if !classification && tables.len() != 1 {
            return Err(self.malformed(node, format!("{} RegressionTables in a regression", tables.len())));
        }
        Ok((Kind::Regression { tables, normalize }, labels))
    }

    fn tree(
        &mut self,
        node: Node<'_, '_>,
        scope: &Scope,
        classification: bool,
        target: Option<&str>,
        fixed: Option<&[String]>,
    ) -> Result<(Kind, Vec<String>), ImportError> {
        let unknown = match node.attribute("missingValueStrategy").unwrap_or("none") {
            "none" => WhenUnknown::NextChild,
            "lastPrediction" => WhenUnknown::LastPrediction,
            "nullPrediction" => WhenUnknown::NoPrediction,
            "defaultChild" => WhenUnknown::DefaultChild,
            other => {
                return Err(self.unsupported(
                    node,
                    format!("missingValueStrategy `{other}`"),
                    "use none, lastPrediction, nullPrediction or defaultChild",
                ));
            }
        };
        let last_when_no_child = match node.attribute("noTrueChildStrategy").unwrap_or("returnNullPrediction") {
            "returnNullPrediction" => false,
            "returnLastPrediction" => true,
            other => return Err(self.malformed(node, format!("noTrueChildStrategy `{other}`"))),
        };
        let root = child(node, "Node").ok_or_else(|| self.malformed(node, "no Node"))?;
        let labels = if classification {
            let found = || {
                let mut seen: Vec<String> = Vec::new();
                for n in root.descendants().filter(|d| d.is_element()) {
                    let label = match tag(n) {
                        "Node" => n.attribute("score"),
                        "ScoreDistribution" => n.attribute("value"),
                        _ => None,
                    };
                    if let Some(l) = label
                        && !seen.iter().any(|s| s == l)
                    {
                        seen.push(l.to_owned());
                    }
                }
                seen
            };
            match fixed {
                Some(f) => f.to_vec(),
                None => self.classes(node, target, found)?,
            }
        } else {
            Vec::new()
        };
        // Pre-order, children after parents; an explicit stack, so a deep
        // tree cannot overflow ours.
        let mut nodes: Vec<TreeNode> = Vec::new();
        let mut ids: Vec<Option<String>> = Vec::new();
        let mut defaults: Vec<Option<(String, Node<'_, '_>)>> = Vec::new();
        let mut stack = vec![(root, None::<usize>)];
        while let Some((n, parent)) = stack.pop() {
            if nodes.len() >= 1 << 22 {
                return Err(self.unsupported(n, "more than 4 M tree nodes", "prune the tree"));
            }
            let at = nodes.len();
            if let Some(p) = parent {
                nodes[p].children.push(at as u32);
            }
            let score = match n.attribute("score") {
                None => f64::NAN,
                Some(s) if classification => labels
                    .iter()
                    .position(|l| l == s)
                    .ok_or_else(|| self.malformed(n, format!("score `{s}` is not one of the classes")))?
                    as f64,
                Some(s) => parse_number(s).ok_or_else(|| self.malformed(n, format!("score `{s}` is not a number")))?,
            };
            let mut probabilities = Vec::new();
            let dist: Vec<Node<'_, '_>> = elements(n).filter(|c| tag(*c) == "ScoreDistribution").collect();
            if classification && !dist.is_empty() {
                probabilities = vec![0.0; labels.len()];
                let total: f64 =
                    dist.iter().map(|d| self.number(*d, "recordCount", Some(0.0))).sum::<Result<f64, _>>()?;
                for d in &dist {
                    let value = self.attr(*d, "value")?;
                    let k = labels
                        .iter()
                        .position(|l| l == value)
                        .ok_or_else(|| self.malformed(*d, format!("value `{value}` is not one of the classes")))?;
                    probabilities[k] = match d.attribute("probability") {
                        Some(_) => self.number(*d, "probability", None)?,
                        None if total > 0.0 => self.number(*d, "recordCount", None)? / total,
                        None => return Err(self.malformed(*d, "no probability, and no record counts to give one")),
                    };
                }
            }
            nodes.push(TreeNode {
                predicate: self.predicate_of(n, scope)?,
                score,
                probabilities,
                children: Vec::new(),
                default_child: None,
                cover: self.number(n, "recordCount", Some(f64::NAN))?,
            });
            ids.push(n.attribute("id").map(str::to_owned));
            defaults.push(n.attribute("defaultChild").map(|d| (d.to_owned(), n)));
            if let Some(p) =
                elements(n).find(|c| tag(*c) == "Partition" || tag(*c) == "Regression" || tag(*c) == "DecisionTree")
            {
                return Err(self.unsupported(p, format!("<{}> in a Node", tag(p)), "give each node a score"));
            }
            let kids: Vec<Node<'_, '_>> = elements(n).filter(|c| tag(*c) == "Node").collect();
            for k in kids.into_iter().rev() {
                stack.push((k, Some(at)));
            }
        }
        // Children were pushed in reverse onto the stack and so numbered in
        // order; a parent's list was filled as each was reached.
        for (i, d) in defaults.iter().enumerate() {
            if let Some((name, n)) = d {
                let c = nodes[i].children.iter().copied().find(|c| ids[*c as usize].as_deref() == Some(name.as_str()));
                nodes[i].default_child =
                    Some(c.ok_or_else(|| {
                        self.malformed(*n, format!("defaultChild `{name}` is not one of its children"))
                    })?);
            }
        }
        Ok((Kind::Tree { nodes, unknown, last_when_no_child }, labels))
    }

    fn mining(
        &mut self,
        node: Node<'_, '_>,
        scope: &mut Scope,
        classification: bool,
        target: Option<&str>,
        fixed: Option<&[String]>,
        depth: usize,
    ) -> Result<(Kind, Vec<String>), ImportError> {
        let segmentation = child(node, "Segmentation")
            .ok_or_else(|| self.unsupported(node, "a MiningModel without Segmentation", "use a Segmentation"))?;
        let method =
            match self.attr(segmentation, "multipleModelMethod")? {
                "sum" => Ensemble::Sum,
                "average" => Ensemble::Average,
                "weightedAverage" => Ensemble::WeightedAverage,
                "majorityVote" => Ensemble::MajorityVote,
                "weightedMajorityVote" => Ensemble::WeightedMajorityVote,
                "modelChain" => Ensemble::Chain,
                "selectFirst" => Ensemble::SelectFirst,
                other => return Err(self.unsupported(
                    segmentation,
                    format!("multipleModelMethod `{other}`"),
                    "use sum, average, weightedAverage, majorityVote, weightedMajorityVote, modelChain or selectFirst",
                )),
            };
        if classification && method == Ensemble::Sum
            || !classification && matches!(method, Ensemble::MajorityVote | Ensemble::WeightedMajorityVote)
        {
            return Err(self.unsupported(
                segmentation,
                format!(
                    "multipleModelMethod `{}` for a {}",
                    segmentation.attribute("multipleModelMethod").unwrap_or(""),
                    if classification { "classification" } else { "regression" }
                ),
                "combine classifiers by vote or average, regressions by sum or average",
            ));
        }
        let labels: Vec<String> = if classification {
            match fixed {
                Some(f) => f.to_vec(),
                None => self.classes(node, target, Vec::new).or_else(|_| {
                    // The first classifying segment's own classes.
                    let first = segmentation
                        .descendants()
                        .find(|d| MODELS.contains(&tag(*d)) && d.attribute("functionName") == Some("classification"));
                    let t = first.and_then(|m| self.target_of(m));
                    match first {
                        Some(m) => self.classes(m, t.as_deref(), Vec::new),
                        None => Err(self.malformed(node, "no classes")),
                    }
                })?,
            }
        } else {
            Vec::new()
        };
        let mut segments = Vec::new();
        for s in elements(segmentation).filter(|c| tag(*c) == "Segment") {
            let predicate = self.predicate_of(s, scope)?;
            let weight = self.number(s, "weight", Some(1.0))?;
            let m =
                elements(s).find(|c| !PREDICATES.contains(&tag(*c))).ok_or_else(|| self.malformed(s, "no model"))?;
            if !MODELS.contains(&tag(m)) {
                return Err(self.unsupported(
                    m,
                    format!("model <{}>", tag(m)),
                    "segments of RegressionModel, TreeModel or MiningModel",
                ));
            }
            // In a chain a segment's function may differ from the whole
            // (a regression feeding a classifier); it then keeps its own classes.
            let inner_classification = m.attribute("functionName") == Some("classification");
            if method != Ensemble::Chain && inner_classification != classification {
                return Err(self.unsupported(
                    m,
                    "a segment whose functionName differs from its ensemble's",
                    "segments of one kind, or a modelChain",
                ));
            }
            let is_last = s.next_siblings().skip(1).all(|n| !(n.is_element() && tag(n) == "Segment"));
            let fixed_inner =
                if inner_classification && (method != Ensemble::Chain || is_last) { Some(&labels[..]) } else { None };
            let (model, _) = self.model(m, scope, fixed_inner, depth + 1)?;
            if method == Ensemble::Chain && is_last && inner_classification != classification {
                return Err(self.unsupported(
                    m,
                    "a chain whose last segment's functionName differs from the chain's",
                    "end the chain with a model of the chain's kind",
                ));
            }
            segments.push(Segment { predicate, weight, model });
        }
        if segments.is_empty() {
            return Err(self.malformed(segmentation, "no Segment"));
        }
        Ok((Kind::Segments { method, segments }, labels))
    }
}

/// Text values collected into a label list.
#[derive(Default)]
struct Labels {
    labels: Vec<String>,
    numeric: bool,
    any: bool,
}

impl Labels {
    fn value(&mut self, text: &str) -> f64 {
        self.any = true;
        if let Some(v) = parse_number(text)
            && self.labels.is_empty()
        {
            self.numeric = true;
            return v;
        }
        self.numeric = false;
        match self.labels.iter().position(|l| l == text) {
            Some(i) => i as f64,
            None => {
                self.labels.push(text.to_owned());
                (self.labels.len() - 1) as f64
            }
        }
    }

    fn finish(self) -> Option<Vec<String>> {
        (self.any && !self.numeric).then_some(self.labels)
    }
}

/// PMML's name of a comparison.
fn comparison(name: &str) -> Option<Compare> {
    Some(match name {
        "equal" => Compare::Equal,
        "notEqual" => Compare::NotEqual,
        "lessThan" => Compare::LessThan,
        "lessOrEqual" => Compare::LessOrEqual,
        "greaterThan" => Compare::GreaterThan,
        "greaterOrEqual" => Compare::GreaterOrEqual,
        _ => return None,
    })
}

fn parse_number(text: &str) -> Option<f64> {
    let t = text.trim();
    match t {
        "INF" | "Infinity" => Some(f64::INFINITY),
        "-INF" | "-Infinity" => Some(f64::NEG_INFINITY),
        _ => t.parse::<f64>().ok().filter(|v| !v.is_nan()),
    }
}

/// The items of a PMML `Array`: space-separated, `"quoted"` when they hold spaces.
fn array_items(text: &str) -> Vec<String> {
    let mut items = Vec::new();
    let mut chars = text.chars().peekable();
    while let Some(&c) = chars.peek() {
        if c.is_whitespace() {
            chars.next();
        } else if c == '"' {
            chars.next();
            let mut item = String::new();
            while let Some(c) = chars.next() {
                match c {
                    '\\' => item.extend(chars.next()),
                    '"' => break,
                    c => item.push(c),
                }
            }
            items.push(item);
        } else {
            let mut item = String::new();
            while let Some(&c) = chars.peek() {
                if c.is_whitespace() {
                    break;
                }
                item.push(c);
                chars.next();
            }
            items.push(item);
        }
    }
    items
}

pub(crate) fn import(bytes: &[u8], file: &str) -> Result<Imported, ImportError> {
    let blame = Blame { file };
    let wrong = || ImportError::WrongFormat {
        file: file.to_owned(),
        expected: Format::Pmml.name(),
        looks_like: crate::looks_like(bytes),
    };
    let text = std::str::from_utf8(bytes).map_err(|_| wrong())?;
    let options = roxmltree::ParsingOptions { allow_dtd: false, nodes_limit: 1 << 24 };
    let doc = Document::parse_with_options(text, options).map_err(|e| {
        if text.trim_start().starts_with('<') {
            let pos = e.pos();
            blame.malformed(&format!("line {} column {}", pos.row, pos.col), format!("not well-formed XML: {e}"))
        } else {
            wrong()
        }
    })?;
    let root = doc.root_element();
    if tag(root) != "PMML" {
        return Err(wrong());
    }
    let mut reader = Reader { doc: &doc, blame: Blame { file }, slots: 0, dictionary: HashMap::new() };
    let version = root.attribute("version").unwrap_or("?").to_owned();
    let dictionary = child(root, "DataDictionary").ok_or_else(|| reader.malformed(root, "no DataDictionary"))?;
    for f in elements(dictionary).filter(|c| tag(*c) == "DataField") {
        let name = reader.attr(f, "name")?.to_owned();
        let mut values = Vec::new();
        let mut intervals = Vec::new();
        for v in elements(f) {
            match tag(v) {
                "Value" if v.attribute("property").unwrap_or("valid") == "valid" => {
                    values.push(reader.attr(v, "value")?.to_owned())
                }
                "Value" => {}
                "Interval" => intervals.push(reader.interval(v)?),
                _ => {}
            }
        }
        let line = doc.text_pos_at(f.range().start).row;
        reader.dictionary.insert(
            name,
            DataField {
                optype: reader.attr(f, "optype")?.to_owned(),
                data_type: reader.attr(f, "dataType")?.to_owned(),
                values,
                intervals,
                line,
            },
        );
    }
    let models: Vec<Node<'_, '_>> =
        elements(root).filter(|c| tag(*c).ends_with("Model") && tag(*c) != "ModelVerification").collect();
    let model_node = match models[..] {
        [one] => one,
        [] => {
            return Err(reader.unsupported(
                root,
                "a document with no model",
                "export a RegressionModel, TreeModel or MiningModel",
            ));
        }
        _ => {
            return Err(reader.unsupported(
                models[1],
                "a second model in one document",
                "export one model per file (or a MiningModel of segments)",
            ));
        }
    };
    if !MODELS.contains(&tag(model_node)) {
        return Err(reader.unsupported(
            model_node,
            format!("model <{}>", tag(model_node)),
            "export a RegressionModel, TreeModel or MiningModel",
        ));
    }
    // The features: the outermost model's active fields, in MiningSchema order.
    let schema = child(model_node, "MiningSchema").ok_or_else(|| reader.malformed(model_node, "no MiningSchema"))?;
    let mut features = Vec::new();
    let mut inputs = Vec::new();
    let mut sources = Vec::new();
    let mut scope = Scope::default();
    for m in elements(schema).filter(|c| tag(*c) == "MiningField") {
        let name = reader.attr(m, "name")?;
        if !matches!(m.attribute("usageType").unwrap_or("active"), "active") {
            continue;
        }
        let d = reader
            .dictionary
            .get(name)
            .cloned()
            .ok_or_else(|| reader.malformed(m, format!("`{name}` is not in the DataDictionary")))?;
        let (feature, input, from) = reader.feature(m, name, &d)?;
        let slot = reader.new_slot(m)?;
        let categorical = matches!(d.optype.as_str(), "categorical" | "ordinal") && d.data_type != "boolean";
        scope.define(
            name,
            Field { slot, labels: categorical.then(|| d.values.clone()), ordinal: d.optype == "ordinal" },
        );
        features.push(feature);
        inputs.push(input);
        sources.push(Provenance { part: format!("feature {name}"), from });
    }
    if features.is_empty() {
        return Err(reader.malformed(schema, "no active MiningField"));
    }
    let derived = reader.derived_fields(child(root, "TransformationDictionary"), &mut scope)?;
    let (model, labels) = reader.model(model_node, &mut scope, None, 0)?;
    let target = reader.target_of(model_node);
    let (outputs, emits): (Vec<Output>, Vec<Emit>) = if model.classes == 0 {
        let name = target.clone().unwrap_or_else(|| "value".to_owned());
        (vec![Output::new(&name, Bounds::OPEN).about("the predicted value")], vec![Emit::Value])
    } else {
        labels
            .iter()
            .enumerate()
            .map(|(k, l)| {
                (
                    Output::new(&format!("probability_{l}"), Bounds::OPEN).about(&format!("the probability of `{l}`")),
                    Emit::Probability(k as u32),
                )
            })
            .unzip()
    };
    for o in &outputs {
        let from = if model.classes == 0 {
            format!("the target field {}", target.as_deref().unwrap_or("(not named)"))
        } else {
            format!("a class of the target field {}", target.as_deref().unwrap_or("(not named)"))
        };
        sources.push(Provenance { part: format!("output {}", o.name), from });
    }
    let params = ProgramParams { inputs, slots: reader.slots, derived, model, outputs: emits };
    // The program's own checks, so a document it cannot run fails here.
    let program = paddock_guest::Program::new(params.clone()).map_err(|e| reader.malformed(model_node, e))?;
    let explains = match program.explains() {
        Ok(()) => "contributions can be asked for".to_owned(),
        Err(why) => format!("contributions are declined: {why}"),
    };
    let application = child(root, "Header").and_then(|h| child(h, "Application"));
    let toolkit = application.map_or("(application not recorded)".to_owned(), |a| {
        format!("{} {}", a.attribute("name").unwrap_or(""), a.attribute("version").unwrap_or("")).trim().to_owned()
    });
    let kind = format!("{} ({})", tag(model_node), model_node.attribute("functionName").unwrap_or(""));
    Ok(Imported {
        contract: Contract { name: model_node.attribute("modelName").unwrap_or("").to_owned(), version: String::new(), about: String::new(), features, outputs },
        estimator: EstimatorParams::Program(params),
        origin: Origin {
            format: Format::Pmml.name().to_owned(),
            file: file.to_owned(),
            toolkit: format!("{toolkit} (PMML {version})"),
            task: kind,
            arithmetic: "double precision; predicates three-valued (a comparison with an absent value is unknown), missing-value strategies as the document says".into(),
            estimator: format!("scoring program: {} slots; {explains}", reader.slots),
            contract: sources,
        },
    })
}

impl Reader<'_, '_> {
    /// A contract feature and its preparation, from its DataField and MiningField.
    fn feature(&self, m: Node<'_, '_>, name: &str, d: &DataField) -> Result<(Feature, Input, String), ImportError> {
        let invalid = m.attribute("invalidValueTreatment").unwrap_or("returnInvalid");
        let categorical = matches!(d.optype.as_str(), "categorical" | "ordinal") && d.data_type != "boolean";
        let mut from = format!("the DataDictionary (line {}): {} {}", d.line, d.optype, d.data_type);
        let bounds = match d.intervals[..] {
            [] => Bounds::OPEN,
            [i] => Bounds { min: i.low.is_finite().then_some(i.low), max: i.high.is_finite().then_some(i.high) },
            _ => Bounds::OPEN,
        };
        let mut valid = Vec::new();
        let feature = if d.data_type == "boolean" {
            Feature::flag(name)
        } else if categorical {
            if d.values.is_empty() {
                return Err(self.unsupported(
                    m,
                    format!("categorical field `{name}` with no listed Values"),
                    "list its values in the DataDictionary",
                ));
            }
            if invalid != "returnInvalid" {
                return Err(self.unsupported(
                    m,
                    format!("invalidValueTreatment `{invalid}` on categorical field `{name}`"),
                    "use returnInvalid: a label outside the list is refused",
                ));
            }
            let labels: Vec<&str> = d.values.iter().map(String::as_str).collect();
            from.push_str(&format!("; labels {}", labels.join(", ")));
            Feature::label(name, &labels)
        } else {
            let (contract_bounds, note) = match invalid {
                "returnInvalid" => (bounds, "values outside the Interval are refused"),
                "asMissing" => {
                    valid = d.intervals.clone();
                    (Bounds::OPEN, "values outside the Intervals count as absent")
                }
                "asIs" => (Bounds::OPEN, "values outside the Interval are used as they are"),
                other => {
                    return Err(self.unsupported(
                        m,
                        format!("invalidValueTreatment `{other}`"),
                        "use returnInvalid, asMissing or asIs",
                    ));
                }
            };
            if d.intervals.len() > 1 && invalid == "returnInvalid" {
                valid = d.intervals.clone();
            }
            if !d.intervals.is_empty() {
                from.push_str(&format!("; {note}"));
            }
            if matches!(d.data_type.as_str(), "integer") {
                Feature::whole(name, contract_bounds)
            } else {
                Feature::real(name, contract_bounds)
            }
        };
        let replacement = match m.attribute("missingValueReplacement") {
            None => f64::NAN,
            Some(t) => {
                from.push_str(&format!("; absent → {t} (missingValueReplacement)"));
                if categorical {
                    d.values.iter().position(|v| v == t).ok_or_else(|| {
                        self.malformed(m, format!("missingValueReplacement `{t}` is not one of the field's values"))
                    })? as f64
                } else {
                    parse_number(t)
                        .ok_or_else(|| self.malformed(m, format!("missingValueReplacement `{t}` is not a number")))?
                }
            }
        };
        let outliers = match m.attribute("outliers").unwrap_or("asIs") {
            "asIs" => Outliers::AsIs,
            "asMissingValues" => {
                Outliers::AsMissing { low: self.number(m, "lowValue", None)?, high: self.number(m, "highValue", None)? }
            }
            "asExtremeValues" => Outliers::AsExtremes {
                low: self.number(m, "lowValue", None)?,
                high: self.number(m, "highValue", None)?,
            },
            other => return Err(self.malformed(m, format!("outliers `{other}`"))),
        };
        from.push_str("; optional: the model handles an absent value as the document says");
        Ok((feature.optional(), Input { replacement, valid, outliers }, from))
    }
}
