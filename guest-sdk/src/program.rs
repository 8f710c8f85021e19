//! Scoring programs: field preparation, derived fields, and models made of
//! predicate trees, regression tables and segments of other models, the
//! way a PMML document describes them — compiled to numbers at pack time
//! (by `paddock-import`), evaluated here with no text at run time.
//!
//! Every value is an `f64` in a slot: the features first (contract order),
//! then derived fields and the outputs a model passes on (a model chain).
//! An absent value is NaN. A categorical value is the index of its label in
//! the field's label list, fixed at pack time, so comparing labels is
//! comparing numbers.
//!
//! Predicates are three-valued: a comparison with an absent value is
//! *unknown*, and `and`, `or`, `xor` and `surrogate` combine unknowns as
//! PMML 4.4 says. A model that gives no prediction (PMML's null
//! prediction) answers NaN, which the host reports as a fault naming the
//! row and output.

use ndarray::{ArrayView2, ArrayViewMut2};
use serde::{Deserialize, Serialize};

use crate::MarginLink;
use crate::exp;
use crate::generic::Evaluate;

mod explain;

/// Deepest nesting of models, predicates and expressions a program may have.
pub const MAX_DEPTH: usize = 64;

/// A range of values: `low`/`high` (infinite when open-ended), each end in
/// or out.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub struct Interval {
    /// The lower end (`-inf` for none).
    pub low: f64,
    /// The upper end (`inf` for none).
    pub high: f64,
    /// Whether `low` itself is in.
    pub low_closed: bool,
    /// Whether `high` itself is in.
    pub high_closed: bool,
}

impl Interval {
    /// Whether `x` lies in the interval (never for NaN).
    pub fn contains(&self, x: f64) -> bool {
        let above = if self.low_closed { x >= self.low } else { x > self.low };
        let below = if self.high_closed { x <= self.high } else { x < self.high };
        above && below
    }
}

/// What becomes of a value outside a field's usual range.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub enum Outliers {
    /// Kept as it is.
    AsIs,
    /// Made absent when below `low` or above `high`.
    AsMissing {
        /// Values below are outliers.
        low: f64,
        /// Values above are outliers.
        high: f64,
    },
    /// Moved to `low` or `high`.
    AsExtremes {
        /// Values below become this.
        low: f64,
        /// Values above become this.
        high: f64,
    },
}

impl Outliers {
    fn apply(self, x: f64) -> f64 {
        match self {
            Outliers::AsIs => x,
            Outliers::AsMissing { low, high } => {
                if x < low || x > high {
                    f64::NAN
                } else {
                    x
                }
            }
            Outliers::AsExtremes { low, high } => {
                if x < low {
                    low
                } else if x > high {
                    high
                } else {
                    x
                }
            }
        }
    }
}

/// How one feature is prepared before any model sees it (PMML's
/// `MiningField`). Labels outside a categorical field's list, and values
/// outside the bounds the contract declares, never reach the program: the
/// host refuses those rows.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Input {
    /// The value an absent input takes (`missingValueReplacement`), or NaN.
    pub replacement: f64,
    /// Values outside these are invalid and become absent
    /// (`invalidValueTreatment="asMissing"`); empty: every value is valid.
    pub valid: Vec<Interval>,
    /// Outlier treatment.
    pub outliers: Outliers,
}

/// A built-in function (PMML's `Apply`).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub enum Function {
    /// `a + b`
    Add,
    /// `a − b`
    Subtract,
    /// `a × b`
    Multiply,
    /// `a ÷ b`
    Divide,
    /// The smallest argument.
    Min,
    /// The largest argument.
    Max,
    /// The sum of the arguments.
    Sum,
    /// The mean of the arguments.
    Avg,
    /// `log₁₀ a`
    Log10,
    /// `ln a`
    Ln,
    /// `√a`
    Sqrt,
    /// `|a|`
    Abs,
    /// `eᵃ`
    Exp,
    /// `aᵇ`
    Pow,
    /// 1 when `a > b`, else 0.
    Threshold,
    /// `⌊a⌋`
    Floor,
    /// `⌈a⌉`
    Ceil,
    /// `a` rounded half away from zero.
    Round,
    /// 1 when `a` is absent, else 0 (never absent itself).
    IsMissing,
    /// 1 when `a` is present, else 0.
    IsNotMissing,
    /// 1 when `a op b`, else 0.
    Compare(Compare),
    /// 1 when every argument is non-zero.
    And,
    /// 1 when some argument is non-zero.
    Or,
    /// 1 when `a` is zero.
    Not,
    /// `b` when `a` is non-zero, else `c` (absent when `c` is not given).
    If,
}

/// A derived value.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub enum Expr {
    /// A number (NaN: absent).
    Constant(f64),
    /// The value in a slot.
    Field(u32),
    /// Piecewise-linear normalisation through `points` (original,
    /// normalised), sorted by original value (PMML's `NormContinuous`).
    Norm {
        /// The slot normalised.
        field: u32,
        /// (original, normalised) pairs, at least two, originals increasing.
        points: Vec<(f64, f64)>,
        /// Outside the first and last point: `AsIs` extrapolates the end
        /// segments; the others use the points' range.
        outliers: Outliers,
        /// The value for an absent input (NaN: absent).
        missing: f64,
    },
    /// 1 when the field equals `value`, else 0 (PMML's `NormDiscrete`).
    Indicator {
        /// The slot.
        field: u32,
        /// The value (a label index for categorical fields).
        value: f64,
        /// The value for an absent input (NaN: absent).
        missing: f64,
    },
    /// The value of the first bin whose interval holds the field (PMML's `Discretize`).
    Bins {
        /// The slot.
        field: u32,
        /// (interval, value) pairs, tried in order.
        bins: Vec<(Interval, f64)>,
        /// The value for an absent input (NaN: absent).
        missing: f64,
        /// The value when no bin holds the input (NaN: absent).
        default: f64,
    },
    /// A lookup table (PMML's `MapValues`): the first row whose keys equal
    /// the fields gives its value.
    Lookup {
        /// The slots compared with each row's keys.
        fields: Vec<u32>,
        /// Rows of `fields.len()` keys then the value, flattened.
        rows: Vec<f64>,
        /// The value when a field is absent (NaN: absent).
        missing: f64,
        /// The value when no row matches (NaN: absent).
        default: f64,
    },
    /// A function of other expressions (PMML's `Apply`).
    Apply {
        /// The function.
        function: Function,
        /// Its arguments.
        args: Vec<Expr>,
        /// The result when an argument is absent (`mapMissingTo`; NaN: absent).
        missing: f64,
        /// The result when the function gives none (`defaultValue`; NaN: absent).
        default: f64,
    },
}

/// A comparison of a field with a value.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub enum Compare {
    /// `=`
    Equal,
    /// `≠`
    NotEqual,
    /// `<`
    LessThan,
    /// `≤`
    LessOrEqual,
    /// `>`
    GreaterThan,
    /// `≥`
    GreaterOrEqual,
}

impl Compare {
    /// Whether `a op b`.
    pub fn holds(self, a: f64, b: f64) -> bool {
        match self {
            Compare::Equal => a == b,
            Compare::NotEqual => a != b,
            Compare::LessThan => a < b,
            Compare::LessOrEqual => a <= b,
            Compare::GreaterThan => a > b,
            Compare::GreaterOrEqual => a >= b,
        }
    }
}

/// How a compound predicate combines its parts.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub enum Logic {
    /// True when all are; false when one is; else unknown.
    And,
    /// True when one is; false when all are; else unknown.
    Or,
    /// Odd count of trues; unknown when any is.
    Xor,
    /// The first part that is not unknown.
    Surrogate,
}

/// A condition on the fields (PMML's predicates).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub enum Predicate {
    /// Always true.
    True,
    /// Always false.
    False,
    /// `field op value`; unknown when the field is absent.
    Compare {
        /// The slot.
        field: u32,
        /// The comparison.
        op: Compare,
        /// The value (a label index for categorical fields).
        value: f64,
    },
    /// True when the field is absent (never unknown).
    IsMissing(u32),
    /// True when the field is present (never unknown).
    IsNotMissing(u32),
    /// Whether the field is one of `values` (or, `negate`d, none of them).
    InSet {
        /// The slot.
        field: u32,
        /// The values.
        values: Vec<f64>,
        /// `isNotIn` rather than `isIn`.
        negate: bool,
    },
    /// Parts combined.
    Compound {
        /// How.
        combine: Logic,
        /// The parts, at least two.
        parts: Vec<Predicate>,
    },
}

/// Three-valued truth.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Truth {
    Yes,
    No,
    Unknown,
}

/// What a tree does when a child's predicate is unknown (PMML's
/// `missingValueStrategy`).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub enum WhenUnknown {
    /// Count it false and try the next child (`none`).
    NextChild,
    /// Stop with the current node's prediction (`lastPrediction`).
    LastPrediction,
    /// Stop with no prediction (`nullPrediction`).
    NoPrediction,
    /// Go on at the node's default child (`defaultChild`); no prediction
    /// when it has none.
    DefaultChild,
}

/// A node of a decision tree (PMML's `Node`).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct TreeNode {
    /// When the node is chosen.
    pub predicate: Predicate,
    /// Its prediction: a value, or a class index (NaN: none).
    pub score: f64,
    /// Class probabilities (classification; empty: all on `score`'s class).
    pub probabilities: Vec<f64>,
    /// Its children, in the order they are tried; each after its parent.
    pub children: Vec<u32>,
    /// Where [`WhenUnknown::DefaultChild`] goes.
    pub default_child: Option<u32>,
    /// How many training records reached the node (PMML's `recordCount`;
    /// NaN: not given). Only contributions read it.
    pub cover: f64,
}

/// One table of a regression (PMML's `RegressionTable`).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct RegressionTable {
    /// The intercept.
    pub intercept: f64,
    /// (slot, exponent, coefficient): `coefficient × xᵉˣᵖᵒⁿᵉⁿᵗ`.
    pub numeric: Vec<(u32, f64, f64)>,
    /// (slot, value, coefficient): the coefficient when the slot equals the value.
    pub categorical: Vec<(u32, f64, f64)>,
    /// (slots, coefficient): the coefficient times the slots' product.
    pub products: Vec<(Vec<u32>, f64)>,
    /// The class whose score this is (classification; 0 otherwise).
    pub class: u32,
}

/// What turns regression scores into the prediction (PMML's `normalizationMethod`).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub enum Normalize {
    /// The scores themselves.
    None,
    /// `eʸᵏ / Σ eʸʲ` (classification), `1 / (1 + e⁻ʸ)` (regression).
    Softmax,
    /// `1 / (1 + e⁻ʸ)`.
    Logit,
    /// The standard normal distribution function.
    Probit,
    /// `1 − e^(−eʸ)`.
    Cloglog,
    /// `e^(−e⁻ʸ)`.
    Loglog,
    /// `½ + atan(y)/π`.
    Cauchit,
    /// `eʸ`.
    Exp,
    /// `yₖ / Σ yⱼ`.
    Simplemax,
}

/// How the segments of an ensemble combine (PMML's `multipleModelMethod`).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub enum Ensemble {
    /// Sum of the values.
    Sum,
    /// Mean of the values, or of the class probabilities.
    Average,
    /// Weighted mean of the values, or of the class probabilities.
    WeightedAverage,
    /// Class probabilities are the share of (weighted) votes.
    MajorityVote,
    /// Like `MajorityVote`, each vote weighted.
    WeightedMajorityVote,
    /// Each segment in turn, its outputs fields for the next; the last
    /// segment chosen answers.
    Chain,
    /// The first segment chosen answers.
    SelectFirst,
}

/// A segment of an ensemble.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Segment {
    /// When the segment takes part.
    pub predicate: Predicate,
    /// Its weight.
    pub weight: f64,
    /// Its model.
    pub model: Submodel,
}

/// Rescaling of a regression's value (PMML's `Target`): clamped to
/// `min`/`max`, times `factor` plus `constant`, then rounded as `cast` says.
#[derive(Clone, Copy, Debug, PartialEq, Serialize, Deserialize)]
pub struct Rescale {
    /// Lower clamp (`-inf` for none).
    pub min: f64,
    /// Upper clamp (`inf` for none).
    pub max: f64,
    /// Multiplier.
    pub factor: f64,
    /// Added after.
    pub constant: f64,
    /// Rounding to a whole number.
    pub cast: Cast,
}

/// Rounding to a whole number.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub enum Cast {
    /// None.
    None,
    /// Half away from zero.
    Round,
    /// Up.
    Ceiling,
    /// Down.
    Floor,
}

/// What a model passes on, or what an output is.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub enum Emit {
    /// The predicted value (a class index for classification).
    Value,
    /// The probability of a class.
    Probability(u32),
}

/// The kind of a model.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub enum Kind {
    /// Regression tables: one (regression) or one per class.
    Regression {
        /// The tables.
        tables: Vec<RegressionTable>,
        /// The normalisation.
        normalize: Normalize,
    },
    /// A decision tree; node 0 is the root.
    Tree {
        /// The nodes.
        nodes: Vec<TreeNode>,
        /// What an unknown predicate does.
        unknown: WhenUnknown,
        /// Whether a node none of whose children is chosen gives its own
        /// prediction (else none).
        last_when_no_child: bool,
    },
    /// An ensemble or chain of models.
    Segments {
        /// How they combine.
        method: Ensemble,
        /// The segments.
        segments: Vec<Segment>,
    },
}

/// One model inside a scoring program (a PMML model; each segment holds one).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Submodel {
    /// Fields derived before the model runs (its local transformations).
    pub derived: Vec<(u32, Expr)>,
    /// What it is.
    pub kind: Kind,
    /// Number of classes (0 for a regression).
    pub classes: u32,
    /// Rescaling of a regression's value.
    pub rescale: Option<Rescale>,
    /// Slots the model fills for the models after it (a chain's output fields).
    pub passes: Vec<(u32, Emit)>,
    /// Fields derived from those after the model runs (transformed outputs).
    pub after: Vec<(u32, Expr)>,
}

/// Parameters of a scoring program.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ProgramParams {
    /// How each feature is prepared (one per contract feature).
    pub inputs: Vec<Input>,
    /// The number of slots (at least the features).
    pub slots: u32,
    /// Fields derived before the model (global transformations), in order.
    pub derived: Vec<(u32, Expr)>,
    /// The model.
    pub model: Submodel,
    /// The contract's outputs, from the model's prediction.
    pub outputs: Vec<Emit>,
}

/// A scoring program ready to evaluate.
#[derive(Clone, Debug)]
pub struct Program {
    params: ProgramParams,
}

/// A model's prediction: a value (or class index) and class probabilities.
struct Prediction {
    value: f64,
    probabilities: Vec<f64>,
}

impl Prediction {
    fn none(classes: u32) -> Self {
        Prediction { value: f64::NAN, probabilities: vec![f64::NAN; classes as usize] }
    }

    fn emit(&self, e: Emit) -> f64 {
        match e {
            Emit::Value => self.value,
            Emit::Probability(k) => self.probabilities.get(k as usize).copied().unwrap_or(f64::NAN),
        }
    }
}

/// Checks of the params' shape, with the place of the first fault.
struct Check {
    slots: u32,
}

impl Check {
    fn slot(&self, s: u32, at: &str) -> Result<(), String> {
        if s < self.slots {
            Ok(())
        } else {
            Err(format!("program params: {at}: slot {s} but there are {}", self.slots))
        }
    }

    fn expr(&self, e: &Expr, depth: usize) -> Result<(), String> {
        if depth > MAX_DEPTH {
            return Err(format!("program params: expressions nested deeper than {MAX_DEPTH}"));
        }
        match e {
            Expr::Constant(_) => Ok(()),
            Expr::Field(f) | Expr::Indicator { field: f, .. } | Expr::Bins { field: f, .. } => {
                self.slot(*f, "expression")
            }
            Expr::Norm { field, points, .. } => {
                self.slot(*field, "normalisation")?;
                if points.len() < 2 || points.windows(2).any(|w| !(w[0].0 < w[1].0)) {
                    return Err("program params: a normalisation needs two points or more, originals increasing".into());
                }
                Ok(())
            }
            Expr::Lookup { fields, rows, .. } => {
                fields.iter().try_for_each(|f| self.slot(*f, "lookup"))?;
                if fields.is_empty() || rows.len() % (fields.len() + 1) != 0 {
                    return Err("program params: lookup rows do not match its fields".into());
                }
                Ok(())
            }
            Expr::Apply { function, args, .. } => {
                let arity = match function {
                    Function::Min | Function::Max | Function::Sum | Function::Avg | Function::And | Function::Or => {
                        1..=usize::MAX
                    }
                    Function::Log10
                    | Function::Ln
                    | Function::Sqrt
                    | Function::Abs
                    | Function::Exp
                    | Function::Floor
                    | Function::Ceil
                    | Function::Round
                    | Function::IsMissing
                    | Function::IsNotMissing
                    | Function::Not => 1..=1,
                    Function::If => 2..=3,
                    _ => 2..=2,
                };
                if !arity.contains(&args.len()) {
                    return Err(format!("program params: {function:?} takes {arity:?} arguments, not {}", args.len()));
                }
                args.iter().try_for_each(|a| self.expr(a, depth + 1))
            }
        }
    }

    fn predicate(&self, p: &Predicate, depth: usize) -> Result<(), String> {
        if depth > MAX_DEPTH {
            return Err(format!("program params: predicates nested deeper than {MAX_DEPTH}"));
        }
        match p {
            Predicate::True | Predicate::False => Ok(()),
            Predicate::Compare { field, .. }
            | Predicate::IsMissing(field)
            | Predicate::IsNotMissing(field)
            | Predicate::InSet { field, .. } => self.slot(*field, "predicate"),
            Predicate::Compound { parts, .. } => {
                if parts.len() < 2 {
                    return Err("program params: a compound predicate needs two parts or more".into());
                }
                parts.iter().try_for_each(|q| self.predicate(q, depth + 1))
            }
        }
    }

    fn model(&self, m: &Submodel, depth: usize) -> Result<(), String> {
        if depth > MAX_DEPTH {
            return Err(format!("program params: models nested deeper than {MAX_DEPTH}"));
        }
        for (slot, e) in &m.derived {
            self.slot(*slot, "derived field")?;
            self.expr(e, 0)?;
        }
        let classes = m.classes as usize;
        for (slot, e) in &m.passes {
            self.slot(*slot, "passed field")?;
            self.emit(*e, m.classes)?;
        }
        for (slot, e) in &m.after {
            self.slot(*slot, "transformed output")?;
            self.expr(e, 0)?;
        }
        match &m.kind {
            Kind::Regression { tables, .. } => {
                if tables.is_empty() || (classes > 0 && tables.len() != classes) {
                    return Err(format!("program params: {} regression tables for {classes} classes", tables.len()));
                }
                let mut seen = vec![false; classes];
                for t in tables {
                    if classes > 0 {
                        match seen.get_mut(t.class as usize) {
                            Some(s) if !*s => *s = true,
                            _ => {
                                return Err(format!(
                                    "program params: regression table for class {} twice or out of range",
                                    t.class
                                ));
                            }
                        }
                    }
                    t.numeric.iter().try_for_each(|(s, _, _)| self.slot(*s, "numeric predictor"))?;
                    t.categorical.iter().try_for_each(|(s, _, _)| self.slot(*s, "categorical predictor"))?;
                    t.products.iter().flat_map(|(ss, _)| ss).try_for_each(|s| self.slot(*s, "predictor term"))?;
                }
            }
            Kind::Tree { nodes, .. } => {
                if nodes.is_empty() {
                    return Err("program params: a tree with no nodes".into());
                }
                for (i, n) in nodes.iter().enumerate() {
                    self.predicate(&n.predicate, 0)?;
                    let later = |c: &u32| (*c as usize) > i && (*c as usize) < nodes.len();
                    if !n.children.iter().all(later) || !n.default_child.iter().all(later) {
                        return Err(format!("program params: tree node {i}: a child is not a later node"));
                    }
                    if !n.probabilities.is_empty() && n.probabilities.len() != classes {
                        return Err(format!(
                            "program params: tree node {i}: {} probabilities for {classes} classes",
                            n.probabilities.len()
                        ));
                    }
                }
            }
            Kind::Segments { segments, .. } => {
                if segments.is_empty() {
                    return Err("program params: an ensemble with no segments".into());
                }
                // A chain's earlier segments may be of another kind: they
                // pass their outputs on through fields.
                let chain = matches!(m.kind, Kind::Segments { method: Ensemble::Chain, .. });
                for (i, s) in segments.iter().enumerate() {
                    self.predicate(&s.predicate, 0)?;
                    if s.model.classes != m.classes && !(chain && i + 1 < segments.len()) {
                        return Err("program params: a segment's classes differ from its ensemble's".into());
                    }
                    self.model(&s.model, depth + 1)?;
                }
            }
        }
        Ok(())
    }

    fn emit(&self, e: Emit, classes: u32) -> Result<(), String> {
        match e {
            Emit::Probability(k) if k >= classes => {
                Err(format!("program params: probability of class {k} but there are {classes}"))
            }
            _ => Ok(()),
        }
    }
}

impl Program {
    /// Checks the parameters and builds the program.
    ///
    /// # Errors
    /// When a slot is out of range, a tree child does not come after its
    /// parent, nesting passes [`MAX_DEPTH`], a table or probability list
    /// does not match the class count, or an output names a class that
    /// does not exist.
    pub fn new(params: ProgramParams) -> Result<Self, String> {
        let features = params.inputs.len() as u32;
        if params.slots < features {
            return Err(format!("program params: {} slots for {features} features", params.slots));
        }
        let check = Check { slots: params.slots };
        for (slot, e) in &params.derived {
            if *slot < features {
                return Err(format!("program params: derived field in feature slot {slot}"));
            }
            check.slot(*slot, "derived field")?;
            check.expr(e, 0)?;
        }
        check.model(&params.model, 0)?;
        if params.outputs.is_empty() {
            return Err("program params: no outputs".into());
        }
        params.outputs.iter().try_for_each(|e| check.emit(*e, params.model.classes))?;
        Ok(Program { params })
    }

    /// Whether the program can give per-row contributions.
    ///
    /// # Errors
    /// Why not, naming the PMML element that stands in the way.
    pub fn explains(&self) -> Result<(), String> {
        explain::explains(self)
    }

    fn row(&self, x: &[f64], slots: &mut Vec<f64>, out: &mut [f64]) {
        self.prepare(x, slots);
        let p = predict(&self.params.model, slots);
        for (o, e) in out.iter_mut().zip(&self.params.outputs) {
            *o = p.emit(*e);
        }
    }

    /// Fills `slots` with a row's prepared features and the derived fields
    /// computed before the model.
    fn prepare(&self, x: &[f64], slots: &mut Vec<f64>) {
        slots.clear();
        slots.resize(self.params.slots as usize, f64::NAN);
        for ((slot, &v), input) in slots.iter_mut().zip(x).zip(&self.params.inputs) {
            let mut v = v;
            if !input.valid.is_empty() && !v.is_nan() && !input.valid.iter().any(|i| i.contains(v)) {
                v = f64::NAN;
            }
            if v.is_nan() {
                v = input.replacement;
            }
            *slot = if v.is_nan() { v } else { input.outliers.apply(v) };
        }
        for (slot, e) in &self.params.derived {
            slots[*slot as usize] = eval(e, slots);
        }
    }
}

fn present(v: f64) -> Option<f64> {
    (!v.is_nan()).then_some(v)
}

fn eval(e: &Expr, slots: &[f64]) -> f64 {
    match e {
        Expr::Constant(c) => *c,
        Expr::Field(f) => slots[*f as usize],
        Expr::Norm { field, points, outliers, missing } => {
            let Some(x) = present(slots[*field as usize]) else { return *missing };
            let (first, last) = (points[0], points[points.len() - 1]);
            let x = match outliers {
                Outliers::AsIs => x,
                Outliers::AsMissing { .. } if x < first.0 || x > last.0 => return f64::NAN,
                Outliers::AsMissing { .. } => x,
                Outliers::AsExtremes { .. } if x < first.0 => return first.1,
                Outliers::AsExtremes { .. } if x > last.0 => return last.1,
                Outliers::AsExtremes { .. } => x,
            };
            // The segment holding x, or the end segment it extends.
            let i = points.windows(2).position(|w| x <= w[1].0).unwrap_or(points.len() - 2);
            let (a, b) = (points[i], points[i + 1]);
            a.1 + (x - a.0) / (b.0 - a.0) * (b.1 - a.1)
        }
        Expr::Indicator { field, value, missing } => match present(slots[*field as usize]) {
            None => *missing,
            Some(x) => f64::from(u8::from(x == *value)),
        },
        Expr::Bins { field, bins, missing, default } => match present(slots[*field as usize]) {
            None => *missing,
            Some(x) => bins.iter().find(|(i, _)| i.contains(x)).map_or(*default, |(_, v)| *v),
        },
        Expr::Lookup { fields, rows, missing, default } => {
            let keys: Vec<f64> = fields.iter().map(|f| slots[*f as usize]).collect();
            if keys.iter().any(|k| k.is_nan()) {
                return *missing;
            }
            rows.chunks_exact(fields.len() + 1)
                .find(|r| r[..fields.len()] == keys[..])
                .map_or(*default, |r| r[fields.len()])
        }
        Expr::Apply { function, args, missing, default } => {
            let values: Vec<f64> = args.iter().map(|a| eval(a, slots)).collect();
            let handles_missing = matches!(function, Function::IsMissing | Function::IsNotMissing | Function::If);
            if !handles_missing && values.iter().any(|v| v.is_nan()) {
                return *missing;
            }
            let v = apply(*function, &values);
            if v.is_nan() || v.is_infinite() { *default } else { v }
        }
    }
}

fn apply(function: Function, v: &[f64]) -> f64 {
    let flag = |b: bool| f64::from(u8::from(b));
    match function {
        Function::Add => v[0] + v[1],
        Function::Subtract => v[0] - v[1],
        Function::Multiply => v[0] * v[1],
        Function::Divide => v[0] / v[1],
        Function::Min => v.iter().copied().fold(f64::INFINITY, f64::min),
        Function::Max => v.iter().copied().fold(f64::NEG_INFINITY, f64::max),
        Function::Sum => v.iter().sum(),
        Function::Avg => v.iter().sum::<f64>() / v.len() as f64,
        Function::Log10 => libm::log10(v[0]),
        Function::Ln => libm::log(v[0]),
        Function::Sqrt => v[0].sqrt(),
        Function::Abs => v[0].abs(),
        Function::Exp => exp::exp(v[0]),
        Function::Pow => libm::pow(v[0], v[1]),
        Function::Threshold => flag(v[0] > v[1]),
        Function::Floor => v[0].floor(),
        Function::Ceil => v[0].ceil(),
        Function::Round => v[0].round(),
        Function::IsMissing => flag(v[0].is_nan()),
        Function::IsNotMissing => flag(!v[0].is_nan()),
        Function::Compare(op) => flag(op.holds(v[0], v[1])),
        Function::And => flag(v.iter().all(|x| *x != 0.0)),
        Function::Or => flag(v.iter().any(|x| *x != 0.0)),
        Function::Not => flag(v[0] == 0.0),
        Function::If => match present(v[0]) {
            None => f64::NAN,
            Some(c) if c != 0.0 => v[1],
            Some(_) => v.get(2).copied().unwrap_or(f64::NAN),
        },
    }
}

fn truth(p: &Predicate, slots: &[f64]) -> Truth {
    let of = |b: bool| if b { Truth::Yes } else { Truth::No };
    match p {
        Predicate::True => Truth::Yes,
        Predicate::False => Truth::No,
        Predicate::Compare { field, op, value } => {
            let Some(x) = present(slots[*field as usize]) else { return Truth::Unknown };
            of(op.holds(x, *value))
        }
        Predicate::IsMissing(f) => of(slots[*f as usize].is_nan()),
        Predicate::IsNotMissing(f) => of(!slots[*f as usize].is_nan()),
        Predicate::InSet { field, values, negate } => match present(slots[*field as usize]) {
            None => Truth::Unknown,
            Some(x) => of(values.contains(&x) != *negate),
        },
        Predicate::Compound { combine, parts } => match combine {
            // `and` stops at a false, `or` at a true; otherwise an unknown
            // part leaves the whole unknown.
            Logic::And => decisive(parts, slots, Truth::No, Truth::Yes),
            Logic::Or => decisive(parts, slots, Truth::Yes, Truth::No),
            Logic::Xor => {
                let mut odd = false;
                for q in parts {
                    match truth(q, slots) {
                        Truth::Unknown => return Truth::Unknown,
                        Truth::Yes => odd = !odd,
                        Truth::No => {}
                    }
                }
                of(odd)
            }
            Logic::Surrogate => {
                parts.iter().map(|q| truth(q, slots)).find(|t| *t != Truth::Unknown).unwrap_or(Truth::Unknown)
            }
        },
    }
}

/// `stop` when a part is; else unknown when a part is; else `otherwise`.
fn decisive(parts: &[Predicate], slots: &[f64], stop: Truth, otherwise: Truth) -> Truth {
    let mut t = otherwise;
    for q in parts {
        match truth(q, slots) {
            r if r == stop => return stop,
            Truth::Unknown => t = Truth::Unknown,
            _ => {}
        }
    }
    t
}

fn predict(m: &Submodel, slots: &mut Vec<f64>) -> Prediction {
    for (slot, e) in &m.derived {
        slots[*slot as usize] = eval(e, slots);
    }
    let mut p = match &m.kind {
        Kind::Regression { tables, normalize } => regression(tables, *normalize, m.classes, slots),
        Kind::Tree { nodes, unknown, last_when_no_child } => {
            tree(nodes, *unknown, *last_when_no_child, m.classes, slots)
        }
        Kind::Segments { method, segments } => ensemble(*method, segments, m.classes, slots),
    };
    if let (Some(r), 0) = (m.rescale, m.classes)
        && !p.value.is_nan()
    {
        let v = (p.value.max(r.min).min(r.max)) * r.factor + r.constant;
        p.value = match r.cast {
            Cast::None => v,
            Cast::Round => v.round(),
            Cast::Ceiling => v.ceil(),
            Cast::Floor => v.floor(),
        };
    }
    for (slot, e) in &m.passes {
        slots[*slot as usize] = p.emit(*e);
    }
    for (slot, e) in &m.after {
        slots[*slot as usize] = eval(e, slots);
    }
    p
}

fn regression(tables: &[RegressionTable], normalize: Normalize, classes: u32, slots: &[f64]) -> Prediction {
    let mut scores = Vec::with_capacity(tables.len());
    for t in tables {
        let mut y = t.intercept;
        for (s, exponent, c) in &t.numeric {
            let x = slots[*s as usize];
            y += c * if *exponent == 1.0 { x } else { libm::pow(x, *exponent) };
        }
        for (s, value, c) in &t.categorical {
            let x = slots[*s as usize];
            if x.is_nan() {
                y = f64::NAN;
            } else if x == *value {
                y += c;
            }
        }
        for (ss, c) in &t.products {
            y += c * ss.iter().map(|s| slots[*s as usize]).product::<f64>();
        }
        scores.push(y);
    }
    if scores.iter().any(|y| y.is_nan()) {
        return Prediction::none(classes);
    }
    let link = |y: f64| match normalize {
        Normalize::None | Normalize::Simplemax => y,
        Normalize::Softmax | Normalize::Logit => 1.0 / (1.0 + exp::exp(-y)),
        Normalize::Probit => 0.5 * libm::erfc(-y / std::f64::consts::SQRT_2),
        Normalize::Cloglog => 1.0 - exp::exp(-exp::exp(y)),
        Normalize::Loglog => exp::exp(-exp::exp(-y)),
        Normalize::Cauchit => 0.5 + libm::atan(y) / std::f64::consts::PI,
        Normalize::Exp => exp::exp(y),
    };
    if classes == 0 {
        return Prediction { value: link(scores[0]), probabilities: Vec::new() };
    }
    // In the tables' order; then each to its class.
    let mut shares = scores;
    match normalize {
        Normalize::Softmax => exp::softmax(&mut shares),
        Normalize::Simplemax => {
            let sum: f64 = shares.iter().sum();
            shares.iter_mut().for_each(|p| *p /= sum);
        }
        // The others give each table but the last its own probability;
        // the last table's class takes what remains.
        _ => {
            let last = shares.len() - 1;
            let mut rest = 1.0;
            for p in &mut shares[..last] {
                *p = link(*p);
                rest -= *p;
            }
            shares[last] = rest;
        }
    }
    let mut probabilities = vec![0.0; classes as usize];
    for (t, p) in tables.iter().zip(shares) {
        probabilities[t.class as usize] = p;
    }
    Prediction { value: argmax(&probabilities), probabilities }
}

fn argmax(p: &[f64]) -> f64 {
    let mut best = 0;
    for (k, v) in p.iter().enumerate() {
        if *v > p[best] {
            best = k;
        }
    }
    best as f64
}

fn tree(nodes: &[TreeNode], unknown: WhenUnknown, last_when_no_child: bool, classes: u32, slots: &[f64]) -> Prediction {
    let answer = |i: usize| {
        let n = &nodes[i];
        let probabilities = if classes == 0 {
            Vec::new()
        } else if n.probabilities.is_empty() {
            (0..classes).map(|k| f64::from(u8::from(k as f64 == n.score))).collect()
        } else {
            n.probabilities.clone()
        };
        if n.score.is_nan() { Prediction::none(classes) } else { Prediction { value: n.score, probabilities } }
    };
    match truth(&nodes[0].predicate, slots) {
        Truth::Yes => {}
        _ => return Prediction::none(classes),
    }
    let mut at = 0usize;
    loop {
        match choose(nodes, unknown, last_when_no_child, at, slots) {
            Choice::Child(c) => at = c,
            Choice::Stop => return answer(at),
            Choice::Nothing => return Prediction::none(classes),
        }
    }
}

/// Where a row goes from a tree node.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum Choice {
    /// On to this child.
    Child(usize),
    /// Nowhere: the node answers (a leaf, or a node that stops the walk).
    Stop,
    /// Nowhere, and there is no prediction.
    Nothing,
}

/// The step a row takes from node `at`, as PMML's tree walk says.
fn choose(nodes: &[TreeNode], unknown: WhenUnknown, last_when_no_child: bool, at: usize, slots: &[f64]) -> Choice {
    let node = &nodes[at];
    if node.children.is_empty() {
        return Choice::Stop;
    }
    for &c in &node.children {
        match truth(&nodes[c as usize].predicate, slots) {
            Truth::Yes => return Choice::Child(c as usize),
            Truth::No => {}
            Truth::Unknown => match unknown {
                WhenUnknown::NextChild => {}
                WhenUnknown::LastPrediction => return Choice::Stop,
                WhenUnknown::NoPrediction => return Choice::Nothing,
                WhenUnknown::DefaultChild => {
                    return node.default_child.map_or(Choice::Nothing, |d| Choice::Child(d as usize));
                }
            },
        }
    }
    if last_when_no_child { Choice::Stop } else { Choice::Nothing }
}

fn ensemble(method: Ensemble, segments: &[Segment], classes: u32, slots: &mut Vec<f64>) -> Prediction {
    let k = classes as usize;
    let (mut total, mut weights, mut chosen) = (0.0, 0.0, 0usize);
    let mut probabilities = vec![0.0; k];
    let mut last = None;
    for s in segments {
        if truth(&s.predicate, slots) != Truth::Yes {
            continue;
        }
        let p = predict(&s.model, slots);
        chosen += 1;
        match method {
            Ensemble::SelectFirst => return p,
            Ensemble::Chain => {
                last = Some(p);
                continue;
            }
            _ => {}
        }
        if p.value.is_nan() {
            return Prediction::none(classes);
        }
        let w =
            if matches!(method, Ensemble::WeightedAverage | Ensemble::WeightedMajorityVote) { s.weight } else { 1.0 };
        weights += w;
        if k == 0 {
            total += w * p.value;
        } else if matches!(method, Ensemble::MajorityVote | Ensemble::WeightedMajorityVote) {
            if let Some(v) = probabilities.get_mut(p.value as usize) {
                *v += w;
            }
        } else {
            probabilities.iter_mut().zip(&p.probabilities).for_each(|(a, b)| *a += w * b);
        }
    }
    if let Some(p) = last {
        return p;
    }
    if chosen == 0 {
        return Prediction::none(classes);
    }
    if k == 0 {
        let value = match method {
            Ensemble::Sum => total,
            _ => total / weights,
        };
        return Prediction { value, probabilities: Vec::new() };
    }
    probabilities.iter_mut().for_each(|p| *p /= weights);
    Prediction { value: argmax(&probabilities), probabilities }
}

impl Evaluate for Program {
    type Params = ProgramParams;

    fn build(params: ProgramParams) -> Result<Self, String> {
        Program::new(params)
    }

    fn features(&self) -> usize {
        self.params.inputs.len()
    }

    fn outputs(&self) -> usize {
        self.params.outputs.len()
    }

    fn explain(&self, rows: ArrayView2<'_, f64>, out: ArrayViewMut2<'_, f64>) -> Result<Vec<MarginLink>, String> {
        explain::explain(self, rows, out)
    }

    fn evaluate(&self, rows: ArrayView2<'_, f64>, mut out: ArrayViewMut2<'_, f64>) {
        let mut slots = Vec::with_capacity(self.params.slots as usize);
        let mut buf = vec![0.0; self.outputs()];
        for (x, mut o) in rows.outer_iter().zip(out.outer_iter_mut()) {
            let x = x.to_vec();
            self.row(&x, &mut slots, &mut buf);
            o.assign(&ndarray::ArrayView1::from(&buf));
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Slot 0 true-valued (1 < 2), slot 1 absent.
    fn parts(a: Truth, b: Truth) -> Vec<Predicate> {
        let p = |t: Truth| match t {
            Truth::Yes => Predicate::True,
            Truth::No => Predicate::False,
            Truth::Unknown => Predicate::Compare { field: 1, op: Compare::Equal, value: 0.0 },
        };
        vec![p(a), p(b)]
    }

    #[test]
    fn compound_predicates_combine_unknowns_as_pmml_says() {
        // The three-valued tables of the DMG PMML 4.4 specification
        // (TreeModel, "Predicates"), from memory.
        use Truth::{No, Unknown, Yes};
        let slots = [1.0, f64::NAN];
        let table = [
            (Logic::And, Yes, Unknown, Unknown),
            (Logic::And, No, Unknown, No),
            (Logic::Or, Yes, Unknown, Yes),
            (Logic::Or, No, Unknown, Unknown),
            (Logic::Xor, Yes, Unknown, Unknown),
            (Logic::Xor, Yes, No, Yes),
            (Logic::Xor, Yes, Yes, No),
            (Logic::Surrogate, Unknown, No, No),
            (Logic::Surrogate, Unknown, Unknown, Unknown),
            (Logic::Surrogate, Yes, No, Yes),
        ];
        for (combine, a, b, want) in table {
            let p = Predicate::Compound { combine, parts: parts(a, b) };
            assert_eq!(truth(&p, &slots), want, "{combine:?} {a:?} {b:?}");
        }
        assert_eq!(truth(&Predicate::IsMissing(1), &slots), Yes);
        assert_eq!(truth(&Predicate::InSet { field: 1, values: vec![0.0], negate: true }, &slots), Unknown);
    }

    #[test]
    fn normalisation_interpolates_and_extends_its_end_segments() {
        let norm = |outliers| Expr::Norm {
            field: 0,
            points: vec![(0.0, 0.0), (10.0, 1.0), (20.0, 3.0)],
            outliers,
            missing: -1.0,
        };
        let at = |e: &Expr, x: f64| eval(e, &[x]);
        let as_is = norm(Outliers::AsIs);
        assert_eq!(at(&as_is, 5.0), 0.5);
        assert_eq!(at(&as_is, 15.0), 2.0);
        assert_eq!(at(&as_is, 30.0), 5.0, "the last segment extended");
        assert_eq!(at(&as_is, -10.0), -1.0, "the first segment extended");
        assert_eq!(at(&as_is, f64::NAN), -1.0, "mapMissingTo");
        assert_eq!(at(&norm(Outliers::AsExtremes { low: 0.0, high: 3.0 }), 30.0), 3.0);
        assert!(at(&norm(Outliers::AsMissing { low: 0.0, high: 20.0 }), 30.0).is_nan());
    }

    #[test]
    fn malformed_programs_are_refused_with_the_reason() {
        let leaf = |children: Vec<u32>| TreeNode {
            cover: f64::NAN,
            predicate: Predicate::True,
            score: 1.0,
            probabilities: vec![],
            children,
            default_child: None,
        };
        let params = |nodes| ProgramParams {
            inputs: vec![Input { replacement: f64::NAN, valid: vec![], outliers: Outliers::AsIs }],
            slots: 1,
            derived: vec![],
            model: Submodel {
                derived: vec![],
                kind: Kind::Tree { nodes, unknown: WhenUnknown::NextChild, last_when_no_child: false },
                classes: 0,
                rescale: None,
                passes: vec![],
                after: vec![],
            },
            outputs: vec![Emit::Value],
        };
        assert!(Program::new(params(vec![leaf(vec![1]), leaf(vec![])])).is_ok());
        let err = Program::new(params(vec![leaf(vec![0])])).unwrap_err();
        assert!(err.contains("tree node 0: a child is not a later node"), "{err}");
        let mut p = params(vec![leaf(vec![])]);
        p.outputs = vec![Emit::Probability(0)];
        assert!(Program::new(p).unwrap_err().contains("probability of class 0 but there are 0"));
    }
}
