"""Design matrices and contrasts from formulas (the only module that imports patsy).

The subject-level design is built once on the pooled trials table, so every subject gets the
same columns and the same factor levels; it is then applied to each subject's rows. The group
design is built the same way on the subjects table. Contrasts are given by column name, by a
patsy constraint string (``"urgency[T.high] - urgency[T.medium]"``) or as numeric vectors; a
list of several is a joint contrast (one row each).

Formulas come from design files that labs share, and patsy evaluates formula terms as Python.
Before anything is evaluated, every term is parsed and checked: only table columns, numbers,
strings and the functions in :data:`FORMULA_FUNCTIONS` may appear; attribute access, subscripts,
dunder names and calls of anything else are refused. Values that would make evaluation itself
costly are refused too: text and lists only as function arguments, powers only of columns and
by a small number (``x ** 2``), integers of at most 15 digits. ``Q("name")`` must quote a
column. Contrast strings are parsed by patsy's constraint parser, which evaluates nothing;
their names must be design columns.
"""

from __future__ import annotations

import ast
import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd
import patsy

from .errors import ContrastError, FormulaError

__all__ = ["FORMULA_FUNCTIONS", "Design", "DesignMatrix", "ContrastMatrix", "build_design",
           "design_matrix", "contrast_matrix", "formula_variables"]

# Functions a formula may call. patsy's own stateful transforms (C, center, standardize, scale,
# I, Q, bs) and coding schemes are added by patsy itself; the numeric ones are ours.
_PATSY_BUILTINS = ("C", "I", "Q", "center", "standardize", "scale", "bs",
                   "Treatment", "Sum", "Poly", "Helmert", "Diff")
_NUMERIC = {"log": np.log, "log10": np.log10, "log2": np.log2, "exp": np.exp, "sqrt": np.sqrt,
            "abs": np.abs}
FORMULA_FUNCTIONS: tuple[str, ...] = _PATSY_BUILTINS + tuple(_NUMERIC)

_ALLOWED_NODES = (ast.Expression, ast.Name, ast.Load, ast.Call, ast.Constant, ast.BinOp,
                  ast.UnaryOp, ast.keyword, ast.List, ast.Tuple, ast.operator, ast.unaryop)


# Bounds on what a formula may cost before patsy expands it (documented in the README).
MAX_FORMULA_LENGTH = 4000     # characters
MAX_FORMULA_DEPTH = 200       # nested operations (patsy's evaluation is recursive)
MAX_TERMS = 500               # terms after expanding *, : and ** (e.g. a*b*c gives 7)
MAX_DESIGN_COLUMNS = 1000     # design columns (factor levels and spline bases included)
_MAX_LIST = 1000              # elements of a list argument (levels=[...], knots=[...])
_MAX_SPLINE_DEGREE = 5        # bs(): the degrees scipy's spline evaluation supports
_CODINGS = ("Treatment", "Sum", "Poly", "Helmert", "Diff")
_BIG = 10**9


def _short(formula: str) -> str:
    return repr(formula if len(formula) <= 60 else formula[:57] + "...")


def _expanded_terms(formula: str, *, where: str) -> int:
    """An upper bound of the number of terms of ``formula``, from its parse tree alone.

    patsy expands ``(a + b + ...)**k`` and ``a*b*...`` into every interaction before anything
    can be checked, which for 22 variables means millions of terms; this count is taken first
    (iteratively: the tree may be deep), so such formulas are refused at no cost.

    Raises
    ------
    FormulaError
        The formula is too long, too deeply nested or expands to more than
        :data:`MAX_TERMS` terms.
    """
    from patsy.parse_formula import parse_formula

    if len(formula) > MAX_FORMULA_LENGTH:
        raise FormulaError(f"{where}: the formula has {len(formula)} characters; formulas may have "
                           f"at most {MAX_FORMULA_LENGTH}")
    try:
        tree = parse_formula(formula)
    except patsy.PatsyError as e:
        raise FormulaError(f"{where}: cannot parse formula {_short(formula)}: {str(e).splitlines()[0]}") from None
    except RecursionError:
        raise FormulaError(f"{where}: formula {_short(formula)} is nested too deeply") from None
    counts: dict[int, int] = {}
    stack = [(tree, 1, False)]
    while stack:
        node, depth, visited = stack.pop()
        if depth > MAX_FORMULA_DEPTH:
            raise FormulaError(f"{where}: formula {_short(formula)} nests more than {MAX_FORMULA_DEPTH} "
                               "operations; write it with fewer terms")
        if not visited:
            stack.append((node, depth, True))
            stack.extend((a, depth + 1, False) for a in node.args)
            continue
        n = [counts.pop(id(a)) for a in node.args]
        kind = node.type
        if kind == "PYTHON_EXPR":
            value = 1
        elif kind in ("ZERO", "ONE", "NUMBER"):
            value = 0
        elif kind == "~":
            value = n[-1]
        elif len(n) == 1:  # unary + keeps, unary - removes
            value = n[0] if kind == "+" else 0
        elif kind == "+":
            value = n[0] + n[1]
        elif kind == "-":
            value = n[0]
        elif kind == ":":
            value = n[0] * n[1]
        elif kind in ("*", "/", "%in%"):
            value = n[0] + n[1] + n[0] * n[1]
        elif kind == "**":
            try:
                k = int(node.args[1].token.extra)
            except (AttributeError, TypeError, ValueError):
                k = _BIG
            value = sum(math.comb(n[0], j) for j in range(1, min(k, n[0]) + 1)) if n[0] < 64 else _BIG
        else:
            value = _BIG
        counts[id(node)] = min(value, _BIG)
    total = counts[id(tree)]
    if total > MAX_TERMS:
        shown = f"{total}" if total < _BIG else "more than a billion"
        raise FormulaError(f"{where}: formula {_short(formula)} expands to {shown} terms; formulas may "
                           f"have at most {MAX_TERMS} (check * and ** over many variables)")
    return total


def _factor_codes(formula: str, *, where: str) -> list[str]:
    _expanded_terms(formula, where=where)
    try:
        desc = patsy.ModelDesc.from_formula(formula)
    except patsy.PatsyError as e:
        raise FormulaError(f"{where}: cannot parse formula {_short(formula)}: {str(e).splitlines()[0]}") from None
    except RecursionError:
        raise FormulaError(f"{where}: formula {_short(formula)} is nested too deeply") from None
    if desc.lhs_termlist:
        raise FormulaError(f"{where}: formula {formula!r} has a left-hand side; give only the "
                           "right-hand side (the EEG data are the response)")
    return [f.code for term in desc.rhs_termlist for f in term.factors]


_MAX_EXPONENT = 16


def _refuse(where: str, code: str, what: str):
    raise FormulaError(f"{where}: term {code!r} {what}")


def _check_values(tree: ast.AST, code: str, *, where: str) -> None:
    """Refuse values that would make evaluation itself costly or strange: text, lists and
    tuples are allowed only as arguments of a call (``C(x, Treatment('b'))``), constants only
    as numbers, text, True, False or None, and a power needs a small number as its exponent
    and a column in its base (``x ** 2``; not ``9 ** 9 ** 9``)."""
    args = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Call):
            args.update(id(a) for a in node.args)
            if any(k.arg is None for k in node.keywords):
                _refuse(where, code, "passes ** keyword arguments, which formulas may not contain")
            args.update(id(k.value) for k in node.keywords)
            if isinstance(node.func, ast.Name):
                _check_call(node, code, where=where)
    for node in ast.walk(tree):
        if isinstance(node, ast.Constant):
            v = node.value
            if v is not None and not isinstance(v, (bool, int, float, str)):
                _refuse(where, code, f"holds the constant {v!r}; only numbers and text may appear")
            if isinstance(v, str) and id(node) not in args:
                _refuse(where, code, f"uses the text {v!r} outside a function argument")
            if isinstance(v, int) and not isinstance(v, bool) and abs(v) > 10**15:
                _refuse(where, code, f"holds the number {v}, larger than formulas allow")
        elif isinstance(node, (ast.List, ast.Tuple)) and id(node) not in args:
            _refuse(where, code, "uses a list or tuple outside a function argument")
        elif isinstance(node, ast.BinOp) and isinstance(node.op, ast.Pow):
            e = node.right
            if isinstance(e, ast.UnaryOp) and isinstance(e.op, (ast.USub, ast.UAdd)):
                e = e.operand
            if not (isinstance(e, ast.Constant) and isinstance(e.value, (int, float))
                    and not isinstance(e.value, bool) and abs(e.value) <= _MAX_EXPONENT):
                _refuse(where, code, f"raises to a power that is not a number of at most "
                        f"{_MAX_EXPONENT} (write e.g. x ** 2)")
            if not any(isinstance(n, ast.Name) and n.id not in FORMULA_FUNCTIONS
                       for n in ast.walk(node.left)):
                _refuse(where, code, "raises a number to a power; only columns may be raised")


def _int_argument(node, code: str, name: str, upper: int, *, where: str) -> None:
    if isinstance(node, ast.Constant) and node.value is None:
        return
    if not (isinstance(node, ast.Constant) and isinstance(node.value, int)
            and not isinstance(node.value, bool) and 0 <= node.value <= upper):
        _refuse(where, code, f"gives {name} that is not a whole number from 0 to {upper}")


def _check_call(node: ast.Call, code: str, *, where: str) -> None:
    """Arguments of the allowed functions that would write memory, read it uninitialised or
    cost more than the design could use."""
    fn = node.func.id
    if fn in _NUMERIC:
        # numpy's out= and where= (also as positional arguments) write in place or leave
        # values uninitialised: one column, nothing else.
        if len(node.args) != 1 or node.keywords:
            _refuse(where, code, f"calls {fn} with more than one argument; write {fn}(column)")
    elif fn == "C" and len(node.args) >= 2:
        coding = node.args[1]
        if isinstance(coding, ast.Call):
            coding = coding.func
        if not (isinstance(coding, ast.Name) and coding.id in _CODINGS):
            _refuse(where, code, f"gives C() a coding that is not one of {', '.join(_CODINGS)} "
                    "(e.g. C(x, Sum))")
    elif fn == "bs":
        named = {k.arg: k.value for k in node.keywords}
        if len(node.args) >= 2:
            named.setdefault("df", node.args[1])
        if "df" in named:
            _int_argument(named["df"], code, "bs() degrees of freedom", MAX_DESIGN_COLUMNS, where=where)
        if "degree" in named:
            _int_argument(named["degree"], code, "bs() a degree", _MAX_SPLINE_DEGREE, where=where)
    for a in list(node.args) + [k.value for k in node.keywords]:
        if isinstance(a, (ast.List, ast.Tuple)) and len(a.elts) > _MAX_LIST:
            _refuse(where, code, f"passes a list of {len(a.elts)} values; at most {_MAX_LIST} are allowed")


def _quoted_column(node: ast.Call, code: str, columns: set, *, where: str, source: str) -> str:
    """The column named by ``Q("name")`` (patsy's quoting of names that are not identifiers)."""
    if (len(node.args) != 1 or node.keywords or not isinstance(node.args[0], ast.Constant)
            or not isinstance(node.args[0].value, str)):
        _refuse(where, code, "uses Q() without a single quoted column name, e.g. Q(\"reaction time\")")
    name = node.args[0].value
    if name not in columns:
        raise FormulaError(f"{where}: {name!r} is not a column of {source} "
                           f"(columns: {', '.join(sorted(columns))})")
    return name


def formula_variables(formula: str, columns, *, where: str, source: str) -> tuple[str, ...]:
    """Check a formula's terms and return the table columns it uses, in order of appearance.

    Raises
    ------
    FormulaError
        The formula does not parse, has a left-hand side, uses a name that is not a column of
        ``source`` nor an allowed function, or contains anything other than names, numbers,
        strings, operators and calls of allowed functions (no attribute access, subscripts,
        dunder names, lambdas or comprehensions).
    """
    columns = set(map(str, columns))
    used: list[str] = []
    for code in _factor_codes(formula, where=where):
        try:
            tree = ast.parse(code, mode="eval")
        except SyntaxError:
            raise FormulaError(f"{where}: term {_short(code)} is not a valid expression") from None
        except (RecursionError, MemoryError):
            raise FormulaError(f"{where}: term {_short(code)} is nested too deeply") from None
        # Refused syntax first, so 'np.log(x)' is reported as attribute access, not as a call.
        for node in ast.walk(tree):
            if not isinstance(node, _ALLOWED_NODES):
                raise FormulaError(f"{where}: term {code!r} uses {type(node).__name__.lower()} "
                                   "syntax, which formulas may not contain (allowed: column names, "
                                   f"numbers, operators and the functions {', '.join(FORMULA_FUNCTIONS)})")
        _check_values(tree, code, where=where)
        for node in ast.walk(tree):
            if isinstance(node, ast.Call) and isinstance(node.func, ast.Name) and node.func.id == "Q":
                name = _quoted_column(node, code, columns, where=where, source=source)
                if name not in used:
                    used.append(name)
        for node in ast.walk(tree):
            if isinstance(node, ast.Call) and not (isinstance(node.func, ast.Name)
                                                   and node.func.id in FORMULA_FUNCTIONS):
                what = node.func.id if isinstance(node.func, ast.Name) else "an expression"
                raise FormulaError(f"{where}: term {code!r} calls {what}, which is not an allowed "
                                   f"function (allowed: {', '.join(FORMULA_FUNCTIONS)})")
            if isinstance(node, ast.Name):
                if node.id.startswith("__"):
                    raise FormulaError(f"{where}: term {code!r} uses the reserved name {node.id!r}")
                if node.id in FORMULA_FUNCTIONS:
                    continue
                if node.id not in columns:
                    raise FormulaError(f"{where}: {node.id!r} is not a column of {source} "
                                       f"(columns: {', '.join(sorted(columns))})")
                if node.id not in used:
                    used.append(node.id)
    return tuple(used)


@dataclass(frozen=True)
class Design:
    """A formula turned into a fixed set of design columns.

    Attributes
    ----------
    formula : str
    column_names : tuple of str
    variables : tuple of str
        Table columns the formula uses.
    factors : dict
        Categorical variables and their levels, reference level first.
    source : str
        Name of the table the design was built on, for messages.
    """

    formula: str
    column_names: tuple[str, ...]
    variables: tuple[str, ...]
    factors: dict[str, tuple[str, ...]]
    source: str
    _info: patsy.DesignInfo = field(repr=False, compare=False)


@dataclass(frozen=True)
class DesignMatrix:
    """One design matrix: ``matrix`` has one row per kept table row (``kept`` marks them)."""

    matrix: np.ndarray
    kept: np.ndarray
    column_names: tuple[str, ...]
    condition_number: float

    @property
    def n_dropped(self) -> int:
        return int((~self.kept).sum())


@dataclass(frozen=True)
class ContrastMatrix:
    """Contrast weights, shape ``(rows, columns)``, with one label per row."""

    matrix: np.ndarray
    labels: tuple[str, ...]

    @property
    def n_rows(self) -> int:
        return self.matrix.shape[0]


def _level_text(x) -> str:
    if isinstance(x, (float, np.floating)) and float(x).is_integer():
        return str(int(x))
    return str(x)


def _prepare(table: pd.DataFrame, variables: tuple[str, ...], levels: dict[str, list[str]],
             *, source: str, factors: dict[str, tuple[str, ...]] | None = None) -> tuple[pd.DataFrame, dict]:
    """Columns the formula uses, with factors as ordered categoricals and numbers as float64."""
    out: dict[str, object] = {}
    found: dict[str, tuple[str, ...]] = {}
    for v in variables:
        col = table[v]
        known = (factors or {}).get(v)
        if known is None and v in levels:
            known = tuple(levels[v])
        is_numeric = pd.api.types.is_numeric_dtype(col) and not pd.api.types.is_bool_dtype(col)
        if known is None and is_numeric:
            out[v] = col.to_numpy(dtype=np.float64, na_value=np.nan)
            continue
        text = col.map(_level_text, na_action="ignore").astype(object)
        text = text.where(col.notna(), None)
        if known is None:
            known = tuple(sorted({t for t in text if t is not None}))
            if not known:
                raise FormulaError(f"{source}: column {v!r} has no values (every entry is missing)")
        else:
            stray = sorted({t for t in text if t is not None and t not in known})
            if stray:
                raise FormulaError(f"{source}: column {v!r} has values {stray} that are not among "
                                   f"its levels {list(known)}")
        found[v] = known
        out[v] = pd.Categorical(text.to_numpy(), categories=list(known))
    return pd.DataFrame(out, index=table.index), found


def _env():
    return patsy.EvalEnvironment([dict(_NUMERIC)])


def build_design(table: pd.DataFrame, formula: str, *, levels: dict[str, list[str]] | None = None,
                 source: str, where: str) -> Design:
    """Build the design of ``formula`` on a whole table (all subjects pooled).

    Parameters
    ----------
    table : pandas.DataFrame
        Pooled trials table (or subjects table for the group design).
    formula : str
        Right-hand side of a patsy formula, e.g. ``"urgency + loudness_db"``.
    levels : dict, optional
        Level order per factor; the first level is the reference of treatment coding. Factors
        without an entry use their sorted values.
    source : str
        Table name used in messages (``"trials.csv"``).
    where : str
        Setting name used in messages (``"subject_model.formula"``).

    Raises
    ------
    FormulaError
        Unsafe or unknown terms, level lists that miss values, a pooled design without usable
        rows, or a rank-deficient pooled design.
    """
    levels = levels or {}
    variables = formula_variables(formula, table.columns, where=where, source=source)
    for v in levels:
        if v not in table.columns:
            raise FormulaError(f"{where.rsplit('.', 1)[0]}.levels: {v!r} is not a column of {source}")
    data, factors = _prepare(table, variables, levels, source=source)
    present = data.notna().all(axis=1) if variables else pd.Series(True, index=data.index)
    try:
        # log/sqrt of non-positive values give NaN; reported below as an error, not as a warning.
        with np.errstate(all="ignore"):
            # What patsy.dmatrix does, in its two steps, so that the columns are counted before
            # the matrix is built: many levels or a large spline basis cost nothing to refuse.
            desc = patsy.ModelDesc.from_formula(formula)
            (info,) = patsy.design_matrix_builders([desc.rhs_termlist], lambda: iter([data]),
                                                   _env(), NA_action="drop")
            n_columns, n_rows = len(info.column_names), int(present.sum())
            if n_columns > MAX_DESIGN_COLUMNS:
                raise FormulaError(f"{where}: formula {_short(formula)} gives {n_columns} design "
                                   f"columns; designs may have at most {MAX_DESIGN_COLUMNS}")
            if n_columns > n_rows:
                raise FormulaError(f"{where}: formula {_short(formula)} gives {n_columns} design "
                                   f"columns for {n_rows} usable rows of {source}")
            (frame,) = patsy.build_design_matrices([info], data, NA_action="drop",
                                                   return_type="dataframe")
    except patsy.PatsyError as e:
        raise FormulaError(f"{where}: {str(e).splitlines()[0]}") from None
    except RecursionError:
        raise FormulaError(f"{where}: formula {_short(formula)} is nested too deeply") from None
    except (ValueError, TypeError, ArithmeticError, IndexError, AttributeError) as e:
        if isinstance(e, FormulaError):
            raise
        # Raised by the transforms on unusable data (e.g. a coding of too few levels).
        raise FormulaError(f"{where}: formula {_short(formula)} cannot be evaluated on {source} "
                           f"({type(e).__name__}: {(str(e).splitlines() or [''])[0]})") from None
    if frame.shape[1] == 0:
        raise FormulaError(f"{where}: formula {formula!r} gives no design columns")
    lost = present & ~data.index.isin(frame.index)
    if lost.any():
        first = lost.index[np.flatnonzero(lost.to_numpy())[0]]
        at = f"row {first + 2}" if isinstance(first, (int, np.integer)) else f"subject {first}"
        raise FormulaError(f"{where}: the formula gives a missing value at {int(lost.sum())} row(s) of "
                           f"{source} whose variables are present (first: {at}); e.g. log or sqrt "
                           "of a non-positive value")
    if frame.shape[0] == 0:
        raise FormulaError(f"{where}: every row of {source} has a missing value in "
                           f"{', '.join(variables)}")
    design = Design(formula=formula, column_names=tuple(frame.columns), variables=variables,
                    factors=factors, source=source, _info=frame.design_info)
    _check_columns(frame.to_numpy(np.float64), design, who=f"{where} on the pooled {source}")
    return design


def _check_columns(X: np.ndarray, design: Design, *, who: str) -> float:
    names = design.column_names
    n, p = X.shape
    inf = [names[j] for j in range(p) if not np.isfinite(X[:, j]).all()]
    if inf:
        raise FormulaError(f"{who}: design column(s) {', '.join(inf)} hold infinite values "
                           "(e.g. a division by zero)")
    zero = [names[j] for j in range(p) if not np.any(X[:, j])]
    if zero:
        raise FormulaError(f"{who}: design column(s) {', '.join(zero)} are all zero")
    if "Intercept" in names:
        const = [names[j] for j in range(p) if names[j] != "Intercept" and np.ptp(X[:, j]) == 0]
        if const:
            raise FormulaError(f"{who}: column(s) {', '.join(const)} are constant, so they cannot "
                               "be told apart from the intercept")
    if n < p:
        raise FormulaError(f"{who}: {n} usable rows for {p} design columns")
    s = np.linalg.svd(X, compute_uv=False)
    tol = s[0] * max(n, p) * np.finfo(float).eps
    rank = int((s > tol).sum())
    if rank < p:
        _, _, vt = np.linalg.svd(X)
        null = vt[rank:]
        involved = [names[j] for j in range(p) if np.abs(null[:, j]).max() > 1e-8]
        raise FormulaError(f"{who}: the design is rank deficient (rank {rank} of {p} columns); "
                           f"collinear columns: {', '.join(involved)}")
    return float(s[0] / s[-1])


def design_matrix(design: Design, table: pd.DataFrame, *, who: str) -> DesignMatrix:
    """Apply a design to some rows of its table (one subject's trials, or the subjects).

    Rows with a missing value in any variable of the formula are dropped and counted.

    Raises
    ------
    FormulaError
        Naming ``who``: no usable rows, a factor level absent, an all-zero or constant column,
        fewer rows than columns, or a rank-deficient design.
    """
    data, _ = _prepare(table, design.variables, {}, source=design.source, factors=design.factors)
    usable = data.notna().all(axis=1)
    if not usable.any():
        empty = [v for v in design.variables if data[v].isna().all()]
        what = f"every value of {', '.join(empty)} is missing" if empty else \
            f"every row has a missing value in {', '.join(design.variables)}"
        raise FormulaError(f"{who}: no usable rows: {what}")
    for v, lv in design.factors.items():
        present = set(data.loc[usable, v].astype(object))
        absent = [x for x in lv if x not in present]
        if absent:
            raise FormulaError(f"{who}: level(s) {', '.join(map(repr, absent))} of {v!r} have no "
                               "usable rows; every level of the formula must be present")
    try:
        (frame,) = patsy.build_design_matrices([design._info], data, NA_action="drop",
                                               return_type="dataframe")
    except patsy.PatsyError as e:
        raise FormulaError(f"{who}: {str(e).splitlines()[0]}") from None
    except (ValueError, TypeError, ArithmeticError, IndexError) as e:
        raise FormulaError(f"{who}: the design cannot be evaluated on these rows "
                           f"({type(e).__name__}: {(str(e).splitlines() or [''])[0]})") from None
    kept = np.asarray(data.index.isin(frame.index))
    X = np.ascontiguousarray(frame.to_numpy(np.float64))
    cond = _check_columns(X, design, who=who)
    return DesignMatrix(matrix=X, kept=kept, column_names=design.column_names, condition_number=cond)


def _vector_label(v) -> str:
    return "[" + ", ".join(f"{x:g}" for x in v) + "]"


def contrast_matrix(design: Design, spec, *, where: str) -> ContrastMatrix:
    """Turn a contrast setting into a weight matrix over ``design.column_names``.

    Parameters
    ----------
    design : Design
    spec : str, sequence of float, or list of those
        A column name, a patsy constraint string (``"a - b"``; commas give several rows), a
        numeric vector with one weight per column, or a list of these for a joint contrast.
    where : str
        Setting name for messages (``"test 'x'.subject_contrast"``).

    Raises
    ------
    ContrastError
        Unknown column names, wrong vector length, a zero row, a constraint with a non-zero
        right-hand side, or linearly dependent rows.
    """
    names = design.column_names
    items = [spec] if isinstance(spec, str) or (isinstance(spec, list) and spec
                                                and all(isinstance(x, (int, float)) for x in spec)) else list(spec)
    rows: list[np.ndarray] = []
    labels: list[str] = []
    for item in items:
        if isinstance(item, str):
            if not item.strip():
                raise ContrastError(f"{where}: an empty contrast; give a column name, e.g. "
                                    f"{names[-1]!r}")
            if len(item) > MAX_FORMULA_LENGTH:
                raise ContrastError(f"{where}: the contrast has {len(item)} characters; contrasts "
                                    f"may have at most {MAX_FORMULA_LENGTH}")
            try:
                lc = design._info.linear_constraint(item)
            except RecursionError:
                raise ContrastError(f"{where}: contrast {_short(item)} is nested too deeply") from None
            except (patsy.PatsyError, ValueError, IndexError, TypeError, KeyError) as e:
                raise ContrastError(f"{where}: {item!r} does not name design columns "
                                    f"(columns: {', '.join(names)}); {str(e).splitlines()[0]}") from None
            if np.any(lc.constants != 0):
                raise ContrastError(f"{where}: {item!r} has a non-zero right-hand side; contrasts test "
                                    "against zero")
            parts = [s.strip() for s in item.split(",")] if lc.coefs.shape[0] > 1 else [item.strip()]
            for r, lab in zip(lc.coefs, parts):
                rows.append(np.asarray(r, dtype=float))
                labels.append(lab)
        else:
            try:
                vec = np.asarray(item, dtype=float)
            except (TypeError, ValueError):
                raise ContrastError(f"{where}: {item!r} is neither a column name nor a vector of "
                                    "weights") from None
            if vec.ndim != 1 or vec.size != len(names):
                raise ContrastError(f"{where}: vector {_vector_label(np.ravel(vec))} has {vec.size} weights; "
                                    f"the design has {len(names)} columns ({', '.join(names)})")
            rows.append(vec)
            labels.append(_vector_label(vec))
    if not rows:
        raise ContrastError(f"{where}: no contrast given; give a column name, a vector of weights "
                            "or a list of them")
    C = np.vstack(rows)
    if not np.all(np.isfinite(C)):
        raise ContrastError(f"{where}: weights must be finite numbers")
    for lab, r in zip(labels, C):
        if not np.any(r):
            raise ContrastError(f"{where}: contrast {lab} has only zero weights")
    if C.shape[0] > 1 and np.linalg.matrix_rank(C) < C.shape[0]:
        raise ContrastError(f"{where}: the {C.shape[0]} contrasts of this joint test are linearly "
                            "dependent; leave out the redundant ones")
    return ContrastMatrix(matrix=C, labels=tuple(labels))
