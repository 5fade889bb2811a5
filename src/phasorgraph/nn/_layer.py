r"""Machinery every layer shares: argument checks, factory dtypes, parameters, bias, empty graphs.

Private to :mod:`phasorgraph.nn` (the names carry no underscore so the layer modules can import
them; nothing here is part of the public API). One helper per check, so a message reads the same
in every layer.
"""

from __future__ import annotations

import math
import numbers
import weakref
from typing import Any, Callable, Optional

import torch
from torch import nn

from .._checks import check_flag
from .._limits import physical_memory
from ..errors import GraphInputError, value_text

REAL = (torch.float32, torch.float64)
COMPLEX_OF = {torch.float32: torch.complex64, torch.float64: torch.complex128}
REAL_OF = {torch.complex64: torch.float32, torch.complex128: torch.float64,
           torch.float32: torch.float32, torch.float64: torch.float64}

#: what every graph-like object answers (a DirectedGraph, or a shard of a distributed graph)
GRAPH_LIKE = ("num_nodes", "num_rows", "operator")


# ---------------------------------------------------------------------- argument checks
def check_count(name: str, value, minimum: int = 1, *, optional: bool = False, maximum: Optional[int] = None,
                why: str = "") -> Optional[int]:
    """An integer >= minimum (and <= maximum when given; bools refused); None passes when ``optional``."""
    if optional and value is None:
        return None
    rule = f"an integer >= {minimum}" if maximum is None else f"an integer in [{minimum}, {maximum}]{why}"
    rule = f"None or {rule}" if optional else rule
    if isinstance(value, bool) or not isinstance(value, numbers.Integral):
        raise GraphInputError(f"{name} must be {rule}; got {value!r}")
    if int(value) < minimum or (maximum is not None and int(value) > maximum):
        raise GraphInputError(f"{name} must be {rule}; got {int(value)}")
    return int(value)


#: the most dyadic scales J a diffusion layer accepts: 2**J sparse products per forward
#: (2**16 = 65536 already takes minutes on a large graph; a typo such as 2**40 would never end)
MAX_SCALES = 16
#: the longest diffusion time a layer computes step by step (ScaleSelector, BandMix low-pass)
MAX_STEPS = 2 ** 16
_SCALES_WHY = " (the largest diffusion time is 2**scales sparse products)"
_STEPS_WHY = " (one sparse product per step)"


def check_scales(name: str, value) -> int:
    """A number of dyadic scales J in [1, MAX_SCALES]."""
    return check_count(name, value, maximum=MAX_SCALES, why=_SCALES_WHY)


def check_steps(name: str, value) -> int:
    """A number of diffusion steps in [1, MAX_STEPS]."""
    return check_count(name, value, maximum=MAX_STEPS, why=_STEPS_WHY)


def real_factory_dtype(dtype) -> Optional[torch.dtype]:
    """The real parameter dtype for factory kwargs (a complex dtype selects its precision)."""
    if dtype is None:
        return None
    if not isinstance(dtype, torch.dtype) or dtype not in REAL_OF:
        raise GraphInputError(
            f"dtype must be torch.float32 or torch.float64 (or complex64/complex128 for that "
            f"precision); got {value_text(dtype)}"
        )
    return REAL_OF[dtype]


def factory_kwargs(device, dtype) -> dict:
    """``{"device": device, "dtype": real dtype}`` for every parameter of a layer."""
    return {"device": device, "dtype": real_factory_dtype(dtype)}


def check_features(x, num_rows: int, in_channels: Optional[int] = None, precision: Optional[torch.dtype] = None,
                   device=None, *, name: str = "x", shape: str = "(N, C_in)", restate_shape: bool = True
                   ) -> torch.Tensor:
    """Validate node features: a 2-D tensor with ``num_rows`` rows (and ``in_channels`` columns,
    the layer's precision and device when given).

    ``num_rows`` is the graph-like object's (or operator's) ``num_rows``: all nodes of a whole
    graph, the owned rows of a shard.

    The integer-feature rule of every layer: features must be float32, float64, complex64 or
    complex128; integer, bool and half tensors are refused with one message, never cast (a cast
    hid mistakes: the walk-based layers turned an int64 similarity scale into inf / NaN).
    Features on the meta device (no values) are refused too.
    """
    if not isinstance(x, torch.Tensor):
        raise GraphInputError(f"{name} must be a torch.Tensor of shape {shape}; got {type(x).__name__}")
    if x.dim() != 2:
        raise GraphInputError(f"{name} must have shape {shape} (2-D); got shape {tuple(x.shape)}")
    again = f" (shape {shape})" if restate_shape else ""
    if x.shape[0] != num_rows:
        raise GraphInputError(f"{name} must have num_nodes = {num_rows} rows{again}; got shape {tuple(x.shape)}")
    if in_channels is not None and x.shape[1] != in_channels:
        raise GraphInputError(
            f"{name} must have in_channels = {in_channels} columns{again}; got shape {tuple(x.shape)}"
        )
    if x.dtype not in REAL_OF:
        # one rule for every layer: integer, bool and half features are refused, never cast
        # (a cast would hide a wrong column or truncate a diffusion scale to an integer)
        raise GraphInputError(
            f"{name} dtype must be float32, float64, complex64 or complex128; got {x.dtype} (convert "
            f"integer features with {name}.float() or {name}.to(layer dtype))"
        )
    if x.device.type == "meta":
        raise GraphInputError(f"{name} is on the meta device, which holds shapes but no values; pass "
                              f"features with values")
    if precision is not None:
        if REAL_OF[x.dtype] != precision:
            raise GraphInputError(
                f"{name} has dtype {x.dtype} but the layer's parameters are {precision}; use the same "
                f"precision (layer.to({precision}) or x.to(...))"
            )
    if device is not None and x.device != device:
        raise GraphInputError(f"{name} is on {x.device} but the layer's parameters are on {device}; move one of them")
    return x


def check_operator(op, precision: torch.dtype, device, *, layer: str):
    """A SparseOperator (anything with ``matmul`` and the operator facts) of the layer's precision and device."""
    if not all(hasattr(op, a) for a in ("matmul", "dtype", "device", "num_rows", "hermitian")):
        raise GraphInputError(f"op must be a SparseOperator; got {type(op).__name__}")
    if REAL_OF[op.dtype] != precision:
        raise GraphInputError(
            f"op has dtype {op.dtype} but {layer}'s parameters are {precision}; use op.to(...) or "
            f"layer.to(...) so the precisions match"
        )
    if op.device != device:
        raise GraphInputError(f"op is on {op.device} but {layer}'s parameters are on {device}; move one of them")
    return op


def check_graph_like(graph, layer: str, needs: tuple = GRAPH_LIKE):
    """A DirectedGraph or any object answering the graph-like protocol (no isinstance on types).

    The protocol: ``num_nodes`` (nodes of the whole graph), ``num_rows`` (rows of x held here),
    ``operator(builder, device=..., **options)`` and, for a learned charge,
    ``magnetic_product(charge, phase=...)``.
    """
    missing = [name for name in needs if not hasattr(graph, name)]
    if missing:
        raise GraphInputError(
            f"graph must be a DirectedGraph (or a graph-like object with {', '.join(needs)}, such as a shard "
            f"of a distributed graph) for {layer}; got {type(graph).__name__}, which lacks {', '.join(missing)}"
        )
    return graph


# ---------------------------------------------------------------------- what layers derive from an operator
#: values layers compute from an operator they are given (its largest eigenvalue, its Fourier
#: basis): one cache shared by every layer, holding each operator weakly (an entry goes when its
#: operator goes), so a forward pass never changes an operator and keeps nothing alive
_DERIVED: "weakref.WeakKeyDictionary" = weakref.WeakKeyDictionary()


def derived(op, key: tuple, build: Callable[[], Any]) -> Any:
    """``build()`` computed once per (operator, key) and kept while the operator lives."""
    entry = _DERIVED.get(op)
    if entry is None:
        entry = _DERIVED[op] = {}
    if key not in entry:
        entry[key] = build()
    return entry[key]


# ---------------------------------------------------------------------- saved options
#: the saved form of the magnetic phase (buffer ``phase_code``, int64, 0-dim): a fixed table that
#: is part of the state_dict format (a new phase is appended, the codes never change)
PHASE_CODES = {"difference": 0, "sign": 1, "relative": 2}


def phase_buffer(phase: str, device) -> torch.Tensor:
    """The 0-dim int64 ``phase_code`` of a (checked) phase name."""
    return torch.tensor(PHASE_CODES[phase], dtype=torch.int64, device=device)


def _saved_phase(value) -> str:
    """The phase name of a saved ``phase_code`` (any real dtype: a ``.float()`` copy still reads)."""
    names = {code: name for name, code in PHASE_CODES.items()}
    ok = isinstance(value, torch.Tensor) and value.numel() == 1 and value.device.type != "meta" \
        and not value.is_complex() and float(value) in names
    if not ok:
        raise GraphInputError(f"state_dict holds phase_code {value_text(value)}; a saved phase_code is one number: "
                              + ", ".join(f"{c} ({n})" for n, c in PHASE_CODES.items()))
    return names[int(value)]


def _saved_charge(value):
    """A saved ``fixed_charge`` as a float (0-dim) or a list of floats."""
    if not isinstance(value, torch.Tensor) or value.device.type == "meta" or value.is_complex() \
            or not value.dtype.is_floating_point:
        raise GraphInputError(f"state_dict holds fixed_charge {value_text(value)}; a saved fixed_charge is a real "
                              f"float tensor of charges in [0, 0.5]")
    return float(value) if value.dim() == 0 else [float(v) for v in value.detach().cpu().reshape(-1).tolist()]


def check_saved_options(layer: str, state_dict: dict, prefix: str, own: dict) -> dict:
    r"""Check the construction options a state_dict was saved with against a layer's own.

    ``own`` maps the layer's option buffers (``"fixed_charge"``, ``"phase_code"``) to pairs
    ``(value, buffer)``: the option as the layer holds it (the phase name; the charge as a float
    or a list of floats) and the buffer itself. A saved buffer that disagrees raises
    :class:`GraphInputError` naming the option, the saved value and the layer's (charges compared
    to the precision they were saved in: a float32 copy keeps about 7 digits). A buffer the
    state_dict lacks (saved before the buffer existed) is filled with the layer's own, so an
    older state_dict loads with ``strict=True``.

    Returns:
        the state_dict to load: the one given, or a copy with the missing buffers filled in.
    """
    filled = None
    for name, (now, mine) in own.items():
        key = prefix + name
        saved = state_dict.get(key)
        if saved is None:
            filled = dict(state_dict) if filled is None else filled
            filled[key] = mine.detach().clone()
            continue
        if name == "phase_code":
            was = _saved_phase(saved)
            if was != now:
                raise GraphInputError(f"state_dict was saved from a {layer} with phase={was!r} but this layer has "
                                      f"phase={now!r}; build the layer with phase={was!r}")
        else:
            was = _saved_charge(saved)
            a, b = (was if isinstance(was, list) else [was]), (now if isinstance(now, list) else [now])
            rel = 1e-12 if saved.dtype == torch.float64 else 1e-6
            if len(a) != len(b) or any(abs(u - v) > rel * max(1.0, abs(v)) for u, v in zip(a, b)):
                raise GraphInputError(f"state_dict was saved from a {layer} with charge {was} but this layer has "
                                      f"charge {now}; build the layer with charge={was}")
    return state_dict if filled is None else filled


# ---------------------------------------------------------------------- parameters
def empty_parameter(shape: tuple, factory: dict) -> nn.Parameter:
    """``nn.Parameter(torch.empty(shape, **factory))``, refused before allocating when it cannot fit.

    (Channel counts such as 2**40 made torch's allocator fail deep inside with its own error.)
    """
    shape = tuple(int(s) for s in shape)
    count = math.prod(shape)  # Python ints: no overflow
    itemsize = torch.empty((), dtype=factory.get("dtype") or torch.get_default_dtype()).element_size()
    if count * itemsize > physical_memory():
        raise GraphInputError(
            f"the layer's parameters of shape {shape} need {count * itemsize / 2 ** 30:.3g} GiB but this "
            f"machine has {physical_memory() / 2 ** 30:.3g} GiB of memory; lower the channel counts, order, "
            f"knots or steps"
        )
    return nn.Parameter(torch.empty(shape, **factory))


def init_uniform_(tensor: torch.Tensor, bound: float) -> torch.Tensor:
    """Real weights: i.i.d. U(-bound, bound), in place (variance bound^2 / 3)."""
    with torch.no_grad():
        return tensor.uniform_(-bound, bound)


def init_complex_uniform_(pairs: torch.Tensor, bound: float) -> torch.Tensor:
    r"""Complex weights stored as real pairs (..., 2): real and imaginary parts i.i.d. U(-a, a).

    :math:`a = \mathrm{bound} / \sqrt 2`, so :math:`E|w|^2 = \mathrm{bound}^2 / 3`: the same
    second moment as the real initialization :func:`init_uniform_` with the same bound.
    """
    with torch.no_grad():
        a = bound / math.sqrt(2.0)
        return pairs.uniform_(-a, a)


def make_parameters(module: nn.Module, weight_shape: tuple, bias: bool, factory: dict,
                    complex_pairs: bool = False) -> None:
    """Register ``weight`` of ``weight_shape`` and ``bias`` (C_out,) or None; a trailing axis of 2
    holds (real, imaginary) pairs when ``complex_pairs``."""
    pair = (2,) if complex_pairs else ()
    module.weight = empty_parameter(tuple(weight_shape) + pair, factory)
    if check_flag("bias", bias):
        module.bias = empty_parameter((module.out_channels,) + pair, factory)
    else:
        module.register_parameter("bias", None)


def reset_uniform(module: nn.Module, bound: float, complex_pairs: bool = False) -> None:
    """U(-bound, bound) for weight and bias (complex pairs: :func:`init_complex_uniform_`),
    in place under ``torch.no_grad()``."""
    init = init_complex_uniform_ if complex_pairs else init_uniform_
    with torch.no_grad():
        init(module.weight, bound)
        if module.bias is not None:
            init(module.bias, bound)


def complex_view(weight: torch.Tensor) -> torch.Tensor:
    """Complex tensor from real pairs (..., 2)."""
    return torch.view_as_complex(weight)


# ---------------------------------------------------------------------- outputs
def empty_output(x: torch.Tensor, out_channels: int, dtype: torch.dtype, params) -> torch.Tensor:
    """The (0, C_out) output of a graph without nodes, still attached to the parameters' graph.

    (A zero-row product is answered here rather than handed to the sparse kernels.) Layers take
    this shortcut only when the whole graph is empty (``num_nodes == 0``): a shard holding no
    rows of a non-empty graph still joins every product.
    """
    anchor = sum(p.sum() * 0 for p in params) + x.sum() * 0
    return torch.zeros(0, out_channels, dtype=dtype, device=x.device) + anchor


def output_dtype(*tensors_or_ops) -> torch.dtype:
    """Complex of the precision of the first tensor when any argument is complex, else that real dtype."""
    cplx = any(t.is_complex() if isinstance(t, torch.Tensor) else t.is_complex for t in tensors_or_ops)
    real = next(t.dtype for t in tensors_or_ops if isinstance(t, torch.Tensor))
    real = REAL_OF[real]
    return COMPLEX_OF[real] if cplx else real


def add_bias(out: torch.Tensor, bias: Optional[torch.Tensor]) -> torch.Tensor:
    """``out + bias``, in place when the dtypes allow (out is always a fresh, non-view tensor here)."""
    if bias is None:
        return out
    if torch.promote_types(out.dtype, bias.dtype) == out.dtype:
        return out.add_(bias)
    return out + bias


# ---------------------------------------------------------------------- real and complex products
def bilinear(f: Callable, a: torch.Tensor, b: torch.Tensor) -> torch.Tensor:
    """``f(a, b)`` for a bilinear ``f`` when a and b may differ in being real or complex.

    A real factor never gets cast to complex: ``f(a_re, b) + i f(a_im, b)`` instead.
    """
    if a.is_complex() == b.is_complex():
        return f(a, b)
    if a.is_complex():
        return torch.complex(f(a.real, b), f(a.imag, b))
    return torch.complex(f(a, b.real), f(a, b.imag))


def mix(t: torch.Tensor, w: torch.Tensor) -> torch.Tensor:
    """``t @ w`` for real or complex t and w: the real factor is cast to the complex dtype.

    One complex GEMM on contiguous operands. (Two real GEMMs on ``t.real`` and ``t.imag`` do
    half the multiplies, but those views have stride 2, so each GEMM first copies its operand;
    measured in bench/layers.py's setting, N = 2e5, 64 x 64, forward + backward took about 2.3x
    longer that way.) Autograd returns the real part of the weight's gradient.
    """
    if t.is_complex() != w.is_complex():
        dtype = t.dtype if t.is_complex() else w.dtype
        return t.to(dtype) @ w.to(dtype)
    return t @ w
