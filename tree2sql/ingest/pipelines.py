"""scikit-learn Pipeline and ColumnTransformer: preprocessing as SQL over the raw columns.

The final step is read by its own family's reader; the steps before it become an input
plan (tree2sql.inputs): one expression per model input over the raw warehouse columns.
Scalers and imputers are taken from their fitted attributes in the order their transform
applies them (impute, then scale, then the tree compares). Encoders are asked directly:
each known category, a missing value and an unseen value are passed through the fitted
encoder's own transform, so drop=, infrequent categories, handle_unknown, unknown_value and
encoded_missing_value come out as the library computes them, not as re-derived here.
"""

from __future__ import annotations

import math
import numbers
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
import pandas as pd

from tree2sql.errors import UserError
from tree2sql.forest import Forest
from tree2sql.ingest import ingest, reads
from tree2sql.inputs import (
    Arith,
    Clip,
    Expr,
    Fill,
    Gap,
    InputPlan,
    IsMissing,
    Lookup,
    NotFinite,
    Raw,
    Refusal,
    Unknown,
    Value,
    raw_column,
    same_value,
)

SUPPORTED_STEPS = ("ColumnTransformer", "Pipeline", "OneHotEncoder", "OrdinalEncoder",
                   "SimpleImputer", "StandardScaler", "MinMaxScaler", "RobustScaler",
                   "'passthrough'", "'drop' (in a ColumnTransformer)")
UNSEEN = "__t2s_unseen_category"  # a probe string no fitted encoder holds (checked)


@dataclass
class Flow:
    """The columns between two steps: one expression each, and whether the library holds
    them as a sparse matrix there (scalers then multiply by a reciprocal instead of dividing)."""

    exprs: list[Expr]
    sparse: bool = False


@dataclass
class _Plan:
    """What the steps learn about the raw columns while they are read."""

    names: tuple[str, ...]
    text: dict[int, str] = field(default_factory=dict)  # raw column -> step reading it as text
    numeric: dict[int, str] = field(default_factory=dict)  # raw column -> step reading a number
    none_gap: dict[int, str] = field(default_factory=dict)  # text column -> step that
    nan_gap: dict[int, str] = field(default_factory=dict)  # saw its gap as None / as NaN
    refusals: dict[Refusal, None] = field(default_factory=dict)

    def read(self, expr: Expr, text: bool, path: str) -> None:
        """Record that `path` reads `expr` as text or as a number; both at once is an error."""
        column = raw_column(expr)
        if column is None:
            if text:
                raise UserError(f"pipeline step {path!r} reads text from a computed column",
                                "encode string columns straight from the table (an imputer "
                                "before the encoder is fine)")
            return
        (self.text if text else self.numeric).setdefault(column, path)
        if column in self.text and column in self.numeric:
            raise UserError(f"column {self.names[column]!r} is read as text by "
                            f"{self.text[column]!r} and as a number by "
                            f"{self.numeric[column]!r}", "give each use its own column")

    def gap(self, expr: Expr, none: bool, path: str) -> None:
        """Record how `path` expects a text column's NULL: None, or NaN (pandas' gap)."""
        column = raw_column(expr)
        if column is None:
            return
        (self.none_gap if none else self.nan_gap).setdefault(column, path)
        if column in self.none_gap and column in self.nan_gap:
            raise UserError(f"column {self.names[column]!r} has gaps that "
                            f"{self.none_gap[column]!r} learned as None and "
                            f"{self.nan_gap[column]!r} as NaN; SQL has one NULL",
                            "refit with one kind of gap per column (e.g. all NaN)")

    def refuse(self, refusal: Refusal) -> None:
        if isinstance(refusal, NotFinite) and isinstance(refusal.arg, Fill) \
                and isinstance(refusal.arg.value, float) and math.isfinite(refusal.arg.value):
            refusal = NotFinite(refusal.arg.arg)  # a finite fill is never infinite
        self.refusals.setdefault(refusal, None)

    def finish(self, features: list[Expr], named: bool) -> InputPlan:
        n = len(self.names)
        return InputPlan(columns=self.names, text=tuple(i in self.text for i in range(n)),
                         null_as_none=tuple(i in self.none_gap for i in range(n)),
                         features=tuple(features), refusals=tuple(self.refusals), named=named)


Handler = Callable[[_Plan, Any, Flow, str], Flow]
_HANDLERS: dict[str, Handler] = {}


def _handles(*names: str) -> Callable[[Handler], Handler]:
    def register(handler: Handler) -> Handler:
        for name in names:
            _HANDLERS[name] = handler
        return handler

    return register


@reads("Pipeline")
def read_pipeline(pipeline: Any) -> Forest:
    *before, (last_name, final) = pipeline.steps
    if final is None or isinstance(final, str) or type(final).__name__ == "Pipeline":
        raise UserError(f"the pipeline's last step {last_name!r} is {final!r}, not a model",
                        "end the pipeline with a tree model tree2sql reads")
    try:
        forest = ingest(final)
    except UserError as exc:
        raise UserError(f"pipeline step {last_name!r}: {exc.problem}", exc.fix) from None
    named = getattr(pipeline, "feature_names_in_", None) is not None
    names = tuple(str(n) for n in pipeline.feature_names_in_) if named \
        else tuple(f"x{i}" for i in range(pipeline.n_features_in_))
    plan = _Plan(names)
    flow = Flow([Raw(i) for i in range(len(names))])
    for step_name, step in before:
        flow = _step(plan, step, flow, step_name)
    if len(flow.exprs) != forest.n_features:
        raise UserError(f"the pipeline's steps give {len(flow.exprs)} columns but its model "
                        f"{last_name!r} reads {forest.n_features}",
                        "check that the pipeline was fitted as saved")
    for expr in flow.exprs:
        plan.read(expr, text=False, path=last_name)
    inputs = plan.finish(flow.exprs, named)
    if named and before and type(before[0][1]).__name__ == "ColumnTransformer":
        inputs = _without_unread_columns(inputs)
    steps = " > ".join(type(s).__name__ if not isinstance(s, str) else s for _, s in before)
    return replace(forest, feature_names=_output_names(pipeline, forest), inputs=inputs,
                   source=f"scikit-learn Pipeline ({steps}) > {forest.source}",
                   _fingerprint=[])


def _step(plan: _Plan, step: Any, flow: Flow, path: str) -> Flow:
    if step is None or (isinstance(step, str) and step == "passthrough"):
        return flow
    name = type(step).__name__
    handler = _HANDLERS.get(name)
    if handler is None:
        shown = repr(step) if isinstance(step, str) else f"a {name}"
        raise UserError(f"pipeline step {path!r} is {shown}, which tree2sql cannot write "
                        "in SQL", "supported steps: " + ", ".join(SUPPORTED_STEPS))
    out = handler(plan, step, flow, path)
    expected = _width(step, len(flow.exprs))
    if expected is not None and expected != len(out.exprs):
        raise UserError(f"pipeline step {path!r} ({name}) gives {expected} columns; tree2sql "
                        f"followed {len(out.exprs)}", "report this pipeline to tree2sql")
    return out


def _width(step: Any, n_inputs: int) -> int | None:
    """The step's own count of output columns, when it can say."""
    try:
        return len(step.get_feature_names_out())
    except Exception:  # some steps cannot name their outputs; the final count still checks
        return None


@_handles("Pipeline")
def _pipeline(plan: _Plan, pipeline: Any, flow: Flow, path: str) -> Flow:
    for name, step in pipeline.steps:
        flow = _step(plan, step, flow, f"{path} > {name}")
    return flow


@_handles("ColumnTransformer")
def _column_transformer(plan: _Plan, ct: Any, flow: Flow, path: str) -> Flow:
    """Each transformer on its columns, outputs side by side in the library's order
    (transformers as listed, then the remainder), times transformer_weights."""
    chosen = ct._transformer_to_input_indices
    exprs: list[Expr] = []
    for name, step, _, weight in ct._iter(fitted=True, column_as_labels=False,
                                          skip_drop=True, skip_empty_columns=True):
        part = _step(plan, step, Flow([flow.exprs[j] for j in chosen[name]]), f"{path} > {name}")
        if weight is not None:  # the library's `result * weight`
            part.exprs = [Arith(e, "*", float(weight)) for e in part.exprs]
        exprs += part.exprs
    return Flow(exprs, sparse=bool(ct.sparse_output_))


@_handles("FunctionTransformer")
def _identity(plan: _Plan, step: Any, flow: Flow, path: str) -> Flow:
    """Only the identity a ColumnTransformer puts in for 'passthrough'."""
    if step.func is not None or step.validate:
        raise UserError(f"pipeline step {path!r} is a FunctionTransformer with a function "
                        "or validation, which tree2sql cannot write in SQL",
                        "supported steps: " + ", ".join(SUPPORTED_STEPS))
    return flow


@_handles("SimpleImputer")
def _imputer(plan: _Plan, imputer: Any, flow: Flow, path: str) -> Flow:
    """Missing -> the fitted statistic; columns without one are dropped unless kept;
    missing indicators (add_indicator) follow, as the library concatenates them."""
    if not _is_gap(imputer.missing_values) or imputer.missing_values is None:
        raise UserError(f"pipeline step {path!r} imputes missing_values="
                        f"{imputer.missing_values!r}", "use missing_values=np.nan (the "
                        "default): SQL NULL is the missing value")
    text = imputer.statistics_.dtype == object
    fill_dtype = getattr(imputer, "_fill_dtype", None)  # transform casts to the fit dtype
    filled = imputer.statistics_ if text or fill_dtype is None \
        else imputer.statistics_.astype(fill_dtype)
    exprs = []
    for expr, value, fill in zip(flow.exprs, imputer.statistics_, filled, strict=True):
        plan.read(expr, text=text, path=path)
        if text:
            plan.gap(expr, none=False, path=path)  # it imputes NaN, never None
        else:
            plan.refuse(NotFinite(expr))  # its check_array allows NaN, not infinity
        if value != value and not imputer.keep_empty_features:  # NaN, as its _get_mask
            continue  # no observed value in fit: the library drops the column
        exprs.append(Fill(expr, _constant(fill, text, path)))
    indicator = getattr(imputer, "indicator_", None)
    if imputer.add_indicator and indicator is not None:
        exprs += [IsMissing(flow.exprs[j]) for j in indicator.features_]
    return Flow(exprs, flow.sparse)


def _constant(value: Any, text: bool, path: str) -> Value:
    if text and isinstance(value, str):
        return value
    if not text and isinstance(value, numbers.Real):
        return float(value)
    raise UserError(f"pipeline step {path!r} fills gaps with {value!r}",
                    "fill text columns with text and numeric columns with numbers")


@_handles("StandardScaler")
def _standard(plan: _Plan, scaler: Any, flow: Flow, path: str) -> Flow:
    """Dense: X -= mean_; X /= scale_. Sparse: X *= 1 / scale_ (no centering)."""
    with_mean = scaler.with_mean and not flow.sparse
    return _affine(plan, flow, path,
                   scaler.mean_ if with_mean else None, scaler.scale_)


@_handles("RobustScaler")
def _robust(plan: _Plan, scaler: Any, flow: Flow, path: str) -> Flow:
    """Dense: X -= center_; X /= scale_. Sparse: X *= 1 / scale_."""
    center = scaler.center_ if scaler.with_centering and not flow.sparse else None
    return _affine(plan, flow, path, center, scaler.scale_ if scaler.with_scaling else None)


def _affine(plan: _Plan, flow: Flow, path: str, center: Any, scale: Any) -> Flow:
    exprs = []
    for i, expr in enumerate(flow.exprs):
        plan.read(expr, text=False, path=path)
        plan.refuse(NotFinite(expr))
        out = expr
        if center is not None:
            out = Arith(out, "-", float(center[i]))
        if scale is not None:
            if flow.sparse:  # inplace_column_scale(X, 1 / scale_), reciprocal in float64
                out = Arith(out, "*", float(np.float64(1.0) / np.float64(scale[i])))
            else:
                out = Arith(out, "/", float(scale[i]))
        exprs.append(out)
    return Flow(exprs, flow.sparse)


@_handles("MinMaxScaler")
def _min_max(plan: _Plan, scaler: Any, flow: Flow, path: str) -> Flow:
    """X *= scale_; X += min_; then numpy.clip to feature_range when clip=True."""
    low, high = (float(v) for v in scaler.feature_range)
    exprs = []
    for i, expr in enumerate(flow.exprs):
        plan.read(expr, text=False, path=path)
        plan.refuse(NotFinite(expr))
        out: Expr = Arith(Arith(expr, "*", float(scaler.scale_[i])), "+",
                          float(scaler.min_[i]))
        exprs.append(Clip(out, low, high) if scaler.clip else out)
    return Flow(exprs, flow.sparse)


@_handles("OneHotEncoder", "OrdinalEncoder")
def _encoder(plan: _Plan, encoder: Any, flow: Flow, path: str) -> Flow:
    dtype = np.dtype(encoder.dtype)
    if dtype.kind == "f" and dtype.itemsize < 8:
        raise UserError(f"pipeline step {path!r} encodes to {dtype}, which later steps "
                        "would compute in", "use the default dtype (float64)")
    one_hot = type(encoder).__name__ == "OneHotEncoder"
    widths = list(encoder._n_features_outs) if one_hot else [1] * len(flow.exprs)
    exprs: list[Expr] = []
    start = 0
    for i, (arg, width) in enumerate(zip(flow.exprs, widths, strict=True)):
        exprs += _encode_feature(plan, encoder, i, arg, slice(start, start + width), path)
        start += width
    return Flow(exprs, sparse=one_hot and bool(encoder.sparse_output))


def _encode_feature(plan: _Plan, encoder: Any, i: int, arg: Expr, outputs: slice,
                    path: str) -> list[Expr]:
    """One Lookup per output column of feature i, from the encoder's own transform."""
    categories = list(encoder.categories_[i])
    known = [c for c in categories if not _is_gap(c)]
    text = _is_text(known, path, i)
    plan.read(arg, text=text, path=path)
    none, nan = (any(c is None for c in categories),
                 any(_is_gap(c) and c is not None for c in categories))
    if none and nan:
        raise UserError(f"pipeline step {path!r} learned None and NaN as two categories of "
                        f"its feature {i}; SQL has one NULL", "refit with one kind of gap")
    gap: Any = None if none else np.nan  # what a NULL must reach the encoder as
    if text and (none or nan):
        plan.gap(arg, none=none, path=path)
    values = [str(c) if text else float(c) for c in known]
    probe = _Probe(encoder, i, text)
    known_rows = probe.run(values)
    missing_row, unseen_row = probe.run_one(gap), probe.run_one(_unseen(values, text))
    if unseen_row is None:
        plan.refuse(Unknown(arg, tuple(values)))
    if missing_row is None:
        plan.refuse(Gap(arg))
    if not text and probe.run_one(math.inf) is None:
        plan.refuse(NotFinite(arg))
    exprs: list[Expr] = []
    for k in range(outputs.start, outputs.stop):
        unknown = math.nan if unseen_row is None else float(unseen_row[k])
        missing = math.nan if missing_row is None else float(missing_row[k])
        groups: dict[float | str, list[Value]] = {}
        for value, row in zip(values, known_rows, strict=True):
            out = float(row[k])
            if not same_value(out, unknown):
                groups.setdefault("nan" if math.isnan(out) else out, []).append(value)
        cases = tuple((tuple(vs), math.nan if key == "nan" else float(key))
                      for key, vs in groups.items())
        exprs.append(Lookup(arg, cases, missing, unknown))
    return exprs


class _Probe:
    """Rows through the fitted encoder: feature i takes the probe values, every other
    feature its first category (always known)."""

    def __init__(self, encoder: Any, i: int, text: bool) -> None:
        self.encoder, self.i, self.text = encoder, i, text
        self.names = getattr(encoder, "feature_names_in_", None)
        self.texts = [c.dtype == object and any(isinstance(v, str) for v in c)
                      for c in encoder.categories_]

    def run(self, values: list[Any]) -> np.ndarray:
        if not values:
            return np.empty((0, 0))
        out = self.encoder.transform(self._rows(values))
        return out.toarray() if hasattr(out, "toarray") else np.asarray(out)

    def run_one(self, value: Any) -> np.ndarray | None:
        """The encoded row, or None when the encoder refuses the value."""
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")  # unknown categories encoded as zeros
                return self.run([value])[0]
        except ValueError:
            return None

    def _rows(self, values: list[Any]) -> Any:
        columns = []
        for j, categories in enumerate(self.encoder.categories_):
            column = values if j == self.i else [categories[0]] * len(values)
            text = self.text if j == self.i else self.texts[j]
            columns.append(pd.Series(column, dtype=object if text else np.float64))
        if self.names is None:
            return pd.concat(columns, axis=1).to_numpy()
        return pd.DataFrame(dict(zip(self.names, columns, strict=True)))


def _is_text(known: list[Any], path: str, i: int) -> bool:
    kinds = {isinstance(c, str) for c in known}
    if len(kinds) > 1 or any(not isinstance(c, str | numbers.Real) for c in known):
        raise UserError(f"pipeline step {path!r} has categories of mixed or unsupported "
                        f"types in its feature {i}", "encode one column of strings or of "
                        "numbers per feature")
    return kinds == {True}


def _unseen(values: list[Value], text: bool) -> Value:
    if text:
        probe = UNSEEN
        while probe in values:
            probe += "_"
        return probe
    finite = [v for v in values if math.isfinite(v)]
    return max(finite) + 1.0 if finite else 0.0


def _is_gap(value: Any) -> bool:
    return value is None or (isinstance(value, numbers.Real) and math.isnan(value))


def _output_names(pipeline: Any, forest: Forest) -> tuple[str, ...]:
    """Model input names as the preprocessing names them (e.g. 'cat__colour_red')."""
    try:
        names = tuple(str(n) for n in pipeline[:-1].get_feature_names_out())
    except Exception:  # a step that cannot name its outputs: keep the model's own names
        return forest.feature_names
    return names if len(names) == forest.n_features else forest.feature_names


def _without_unread_columns(plan: InputPlan) -> InputPlan:
    """Drop raw columns no model input reads (a ColumnTransformer selects by name, so the
    table need not hold columns the pipeline drops)."""
    used = sorted({c for e in (*plan.features, *_refusal_args(plan)) for c in _columns(e)})
    index = {old: new for new, old in enumerate(used)}
    return InputPlan(columns=tuple(plan.columns[c] for c in used),
                     text=tuple(plan.text[c] for c in used),
                     null_as_none=tuple(plan.null_as_none[c] for c in used),
                     features=tuple(_renumber(e, index) for e in plan.features),
                     refusals=tuple(replace(r, arg=_renumber(r.arg, index))
                                    for r in plan.refusals),
                     named=plan.named)


def _refusal_args(plan: InputPlan) -> list[Expr]:
    return [r.arg for r in plan.refusals]


def _columns(expr: Expr) -> list[int]:
    if isinstance(expr, Raw):
        return [expr.column]
    return _columns(expr.arg)


def _renumber(expr: Expr, index: dict[int, int]) -> Expr:
    if isinstance(expr, Raw):
        return Raw(index[expr.column])
    return replace(expr, arg=_renumber(expr.arg, index))
