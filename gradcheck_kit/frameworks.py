"""Front of the pipeline: PyTorch and JAX values in, numpy values to the engine, and back.

A check whose params hold torch tensors, a `torch.nn.Module` or JAX arrays runs
through the same engine on numpy copies.  `takes_framework_values` wraps each
public entry (`compare_gradient`, `numeric_gradient`, `compare_jacobian`): it
turns the params into a numpy tree (float64 unless keep_precision=True), wraps
the cost so that every call builds framework values from the numpy point and
returns plain numbers, and takes the analytic side from the framework when
gradient=None (torch.autograd, jax.grad), so custom backward rules are what is
checked.  Neither framework is imported here: a value is recognised by its type
through `sys.modules`, so a user without them pays nothing, and a check on
numpy values runs exactly as before.

Every leaf of a tree that holds torch (or JAX) values reaches the cost as a
tensor (or array) of the framework, plain floats and numpy arrays too.  A module
reaches the cost as itself, with its trainable parameters swapped for the
checked values during each call (`torch.func.functional_call`); its frozen
parameters and its buffers are held fixed.
"""
from __future__ import annotations

import functools
import inspect
import pickle
import sys
import threading
from pathlib import Path

import numpy as np

from .errors import CheckInputError
from .tree import ROOT_NAME, leaves_of
from .evaluate import draw_seed

TORCH, JAX = "torch", "jax"
# Values of a batched call that differ from a plain call by more than this (relative to
# the value's size) mean the cost behaves differently under vmap: use plain calls.
VMAP_AGREEMENT = 1e-6
LOW_PRECISION = ("float16", "bfloat16", "float32")


# --- recognising framework values ------------------------------------------------------

def value_framework(value):
    """'torch', 'jax' or None: the framework a single value belongs to.

    Parameters
    ----------
    value : object
        Any value; a framework that is not imported cannot have made it.

    Returns
    -------
    str or None

    Examples
    --------
    >>> import numpy as np
    >>> value_framework(np.ones(2)) is None
    True
    """
    torch = sys.modules.get("torch")
    if torch is not None and isinstance(value, (torch.Tensor, torch.nn.Module)):
        return TORCH
    jax = sys.modules.get("jax")
    if jax is not None and isinstance(value, jax.Array):
        return JAX
    return None


def _items(tree, path=()):
    """(path, leaf) of a dict / list / tuple nest, depth first; a module is a leaf here."""
    if isinstance(tree, dict):
        for key, value in tree.items():
            yield from _items(value, path + (key,))
    elif isinstance(tree, (list, tuple)):
        for i, value in enumerate(tree):
            yield from _items(value, path + (i,))
    else:
        yield path, tree


def _name(path) -> str:
    return ".".join(str(p) for p in path) if path else ROOT_NAME


def framework_of(params):
    """The framework whose values a params tree holds: 'torch', 'jax' or None.

    Parameters
    ----------
    params : object
        An array, a float, a tensor, a module, or a dict / list / tuple nest of those.

    Returns
    -------
    str or None
        None when the tree holds no framework value (plain numpy).

    Raises
    ------
    CheckInputError
        When torch and JAX values are mixed in one tree.

    Examples
    --------
    >>> import numpy as np
    >>> framework_of({"W": np.ones((2, 2)), "b": 0.5}) is None
    True
    """
    first = {}
    for path, leaf in _items(params):
        kind = value_framework(leaf)
        if kind is not None:
            first.setdefault(kind, _name(path))
    if len(first) > 1:
        raise CheckInputError(
            f"params mixes torch values (first at '{first[TORCH]}') and jax values (first at "
            f"'{first[JAX]}'); one check differentiates through one framework: convert the "
            "other side (e.g. with numpy.asarray, or torch.as_tensor / jax.numpy.asarray)")
    return next(iter(first), None)


def is_framework_structure(value) -> bool:
    """True for a torch module, tensor or JAX array: a params structure, never a function of
    a random generator even when callable (a module is callable)."""
    return value_framework(value) is not None


# --- outputs to plain numbers ------------------------------------------------------------

def _to_numpy(value, what: str):
    """A tensor or JAX array as a numpy array in its own float dtype (bfloat16: float32)."""
    kind = value_framework(value)
    if kind == TORCH:
        torch = sys.modules["torch"]
        if isinstance(value, torch.nn.Module):
            raise CheckInputError(f"{what}: got a torch module; expected tensors or numbers")
        t = value.detach()
        if t.dtype == torch.bfloat16:
            t = t.float()
        try:
            return t.cpu().resolve_conj().resolve_neg().numpy()
        except Exception as exc:  # noqa: BLE001 - e.g. a meta tensor
            raise CheckInputError(f"{what}: a tensor on device {t.device} whose values cannot be "
                                  f"read ({type(exc).__name__}: {exc})") from exc
    if kind == JAX:
        array = np.asarray(value)
        return array.astype(np.float32) if array.dtype.name == "bfloat16" else array
    return value


def _number(value):
    """One value of a scalar cost as a float, complex or numpy scalar (its dtype kept)."""
    if isinstance(value, float) or value_framework(value) is None:
        return value
    array = _to_numpy(value, "cost")
    if array.size != 1:
        raise ValueError(f"the cost returned a {value_framework(value)} value with {array.size} "
                         f"elements (shape {tuple(array.shape)}); expected one number: a 0-d "
                         "tensor or array (reduce it with .sum() or .mean())")
    return array.reshape(())[()]


def _arrays(value):
    """Every framework leaf of a dict / list / tuple nest as a numpy array; the rest as is."""
    if isinstance(value, dict):
        return {k: _arrays(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return _like(value, [_arrays(v) for v in value])
    return _to_numpy(value, "value")


def _listed(names, shown=5) -> str:
    """'a, b, c' with ' ...' when there are more than `shown`."""
    names = list(names)
    return ", ".join(map(str, names[:shown])) + (" ..." if len(names) > shown else "")


def _named_like(wrapper, cost):
    """Give a wrapper the cost's names and signature (through __wrapped__), so progress
    bars, messages and the engine's argument checks see the user's cost."""
    wrapper.__wrapped__ = cost
    for attribute in ("__name__", "__qualname__"):
        name = getattr(cost, attribute, None)
        if isinstance(name, str):
            setattr(wrapper, attribute, name)


def _like(seq, children):
    """A list or tuple (namedtuples too) of the type of seq holding children."""
    if hasattr(seq, "_fields"):
        return type(seq)(*children)
    return type(seq)(children)


class NumpyOutputs:
    """A numpy-params cost whose framework outputs become numpy values (a 0-d tensor a number).

    Used when torch is loaded but params are plain numpy: a cost may still compute
    with tensors and return one.  Anything that is not a framework value passes
    through untouched, so autograd's tracing and numpy costs are unaffected.
    """

    def __init__(self, cost, scalar: bool, gradient_needed: str = ""):
        self.cost, self.scalar, self.gradient_needed = cost, scalar, gradient_needed
        _named_like(self, cost)

    def __call__(self, params, *rest):
        out = self.cost(params, *rest)
        kind = value_framework(out) if not isinstance(out, float) else None
        if kind is None:
            return _arrays(out) if not self.scalar else out
        if self.gradient_needed:
            differentiator = "torch.autograd" if kind == TORCH else "jax.grad"
            raise CheckInputError(
                f"{self.gradient_needed}=None: the cost returns a {kind} value computed from "
                "numpy params, "
                "which autograd (the numpy differentiator) cannot trace; pass params as "
                f"{kind} values so that {differentiator} derives the gradient, or pass gradient=")
        return _number(out) if self.scalar else _arrays(out)


# --- the torch side -----------------------------------------------------------------------

def _torch_float_dtype(t, name: str):
    """Refuse integer, boolean and complex tensors, naming the leaf."""
    if t.dtype.is_complex:
        raise CheckInputError(f"params leaf '{name}' is a complex tensor ({t.dtype}); only real "
                              "parameters are checked (split real and imaginary parts)")
    if not t.dtype.is_floating_point:
        raise CheckInputError(f"params leaf '{name}' is a {t.dtype} tensor; gradients need "
                              "floating-point leaves: convert it with .double() or .float()")


def _working_numpy_dtype(dtype_name: str, widen: bool):
    """(numpy dtype the engine sees, bfloat16 narrowed to float32?) for a framework dtype."""
    if widen:
        return np.dtype(np.float64), False
    if dtype_name == "bfloat16":
        return np.dtype(np.float32), True
    return np.dtype(dtype_name), False


def _read_tensor(t, name: str, dtype):
    """A tensor's values as a numpy array of `dtype`; a clear error for unreadable devices."""
    torch = sys.modules["torch"]
    try:
        host = t.detach().to(device="cpu", dtype=torch.float64 if dtype == np.float64
                             else getattr(torch, dtype.name))
        return host.numpy().copy()
    except Exception as exc:  # noqa: BLE001 - meta tensors, unreachable devices
        raise CheckInputError(
            f"params leaf '{name}' is on device {t.device}, whose values cannot be read "
            f"({type(exc).__name__}: {exc}); move it to a device that holds values, e.g. "
            f"{name}.to('cpu')") from exc


class _Slot:
    """One module of the params tree: what is checked, what is held fixed."""

    def __init__(self, number, module, path):
        self.number, self.module, self.name = number, module, _name(path)
        params = list(module.named_parameters())
        self.trainable = [(n, p) for n, p in params if p.requires_grad]
        self.frozen = [(n, p) for n, p in params if not p.requires_grad]
        self.buffers = list(module.named_buffers())

    def key(self, name: str) -> str:
        return f"held.{self.number}.{name}"


def _dropout_in_training(torch, module):
    """(name, submodule) of the first dropout layer that is active, else None."""
    dropout = torch.nn.modules.dropout._DropoutNd
    for name, sub in module.named_modules():
        if sub.training and isinstance(sub, dropout) and sub.p > 0:
            return name or type(sub).__name__, sub
    return None


class TorchBridge:
    """Numpy points to torch values and calls, for one params tree (see the module text)."""

    framework = TORCH

    def __init__(self, template, widen: bool, rng_option: bool = False, seeded=False):
        torch = sys.modules["torch"]
        self.seeded = seeded     # with_rng=True: the cost seeds its own randomness
        self.torch, self.template, self.widen = torch, template, widen
        self.slots, self.devices, self.own_dtypes, self.notes = [], [], [], []
        self.widened, self.narrowed, self.on_devices = [], [], set()
        self.rng_option = rng_option
        self.params = self._numpy_tree(template, ())
        self.holder = self._holder() if self.slots else None
        self._lock = threading.Lock()

    def __getstate__(self):  # a process pool gets the bridge without its lock
        state = dict(self.__dict__)
        state.pop("_lock")
        state.pop("torch")
        return state

    def __setstate__(self, state):
        self.__dict__.update(state)
        self.torch = __import__("torch")
        self._lock = threading.Lock()

    # the numpy tree the engine sees
    def _numpy_tree(self, t, path):
        torch = self.torch
        if isinstance(t, torch.nn.Module):
            return self._module(t, path)
        if isinstance(t, dict):
            return type(t)((k, self._numpy_tree(v, path + (k,))) for k, v in t.items())
        if isinstance(t, (list, tuple)):
            return _like(t, [self._numpy_tree(v, path + (i,)) for i, v in enumerate(t)])
        if isinstance(t, torch.Tensor):
            return self._leaf(t, _name(path))
        self.devices.append(None)          # a plain leaf: a CPU tensor in every call
        self.own_dtypes.append(None)
        return t

    def _leaf(self, t, name):
        _torch_float_dtype(t, name)
        dtype_name = str(t.dtype).replace("torch.", "")
        dtype, narrowed = _working_numpy_dtype(dtype_name, self.widen)
        if dtype_name in LOW_PRECISION and self.widen:
            self.widened.append(name)
        if narrowed:
            self.narrowed.append(name)
        if t.device.type != "cpu":
            self.on_devices.add(str(t.device))
        self.devices.append(t.device)
        self.own_dtypes.append(t.dtype)
        return _read_tensor(t, name, dtype)

    def _module(self, module, path):
        torch = self.torch
        active = None if self.seeded else _dropout_in_training(torch, module)
        if active is not None:
            where, sub = active
            with_rng = (" or make the cost seed its randomness from the generator it is given "
                        "and pass with_rng=True") if self.rng_option else ""
            raise CheckInputError(
                f"params: the module{' ' + repr(_name(path)) if path else ''} is in training "
                f"mode and has dropout ({where}: {type(sub).__name__} with p={sub.p}): every "
                "call draws a new mask, so the cost is random and numeric derivatives mean "
                f"nothing; call .eval() on the module before the check{with_rng}")
        slot = _Slot(len(self.slots), module, path)
        if not slot.trainable:
            raise CheckInputError(
                f"params: the module{' ' + repr(_name(path)) if path else ''} "
                f"({type(module).__name__}) has no trainable parameters (none with "
                "requires_grad=True), so there is nothing to check")
        self.slots.append(slot)
        if slot.frozen:
            self.notes.append(
                f"{len(slot.frozen)} parameter(s) of the module have requires_grad=False and are "
                f"held fixed, not checked: {_listed(n for n, _ in slot.frozen)}")
        prefix = "" if not path else _name(path) + "."
        return {name: self._leaf(p, prefix + name) for name, p in slot.trainable}

    def _holder(self):
        torch = self.torch

        class Holder(torch.nn.Module):
            """The params' modules as submodules, so one functional_call swaps them all."""

            def __init__(self, modules):
                super().__init__()
                self.held = torch.nn.ModuleList(modules)

            def forward(self, thunk):
                return thunk()

        return Holder([s.module for s in self.slots])

    def _fixed_values(self):
        """Frozen parameters and buffers, fresh for each call, floats in the working dtype."""
        values = {}
        for slot in self.slots:
            for name, value in slot.frozen + slot.buffers:
                v = value.detach()
                if v.is_floating_point() and self.widen:
                    v = v.double()
                values[slot.key(name)] = v.clone()
        return values

    # calls
    def tensors(self, numpy_tree, requires_grad=False):
        """The leaves of a numpy tree (as the engine rebuilt it) as fresh torch tensors."""
        torch = self.torch
        out = []
        for value, device in zip(leaves_of(numpy_tree), self.devices):
            t = torch.from_numpy(np.array(value))
            if device is not None and device.type != "cpu":
                t = t.to(device)
            out.append(t.requires_grad_(True) if requires_grad else t)
        return out

    def assemble(self, leaves):
        """(the user's tree with these leaves, the module values to swap in)."""
        swaps = {}
        it = iter(leaves)

        def build(t):
            if isinstance(t, self.torch.nn.Module):
                slot = next(s for s in self.slots if s.module is t)
                for name, _ in slot.trainable:
                    swaps[slot.key(name)] = next(it)
                return t
            if isinstance(t, dict):
                return type(t)((k, build(v)) for k, v in t.items())
            if isinstance(t, (list, tuple)):
                return _like(t, [build(v) for v in t])
            return next(it)
        return build(self.template), swaps

    def run(self, fn, leaves, rest=()):
        """fn(tree, *rest) with the tree built from leaves, modules swapped in."""
        tree, swaps = self.assemble(leaves)
        if not swaps:
            return fn(tree, *rest)
        swaps.update(self._fixed_values())
        with self._lock:  # the modules are shared: one swapped call at a time
            return self.torch.func.functional_call(self.holder, swaps,
                                                   (lambda: fn(tree, *rest),))

    def gradient(self, cost, numpy_tree):
        """torch.autograd's gradient of the cost at a numpy point, as a numpy tree."""
        torch = self.torch
        with torch.enable_grad():
            leaves = self.tensors(numpy_tree, requires_grad=True)
            out = self.run(cost, leaves)
            if not isinstance(out, torch.Tensor):
                raise CheckInputError(
                    f"gradient=None: the cost returned a {type(out).__name__}, not a tensor, so "
                    "torch.autograd cannot differentiate it; return the loss tensor (not "
                    ".item() or float(...)), or pass gradient=")
            if not out.requires_grad:
                raise CheckInputError(
                    "gradient=None: the cost's result does not depend on params through torch "
                    "operations (it has no grad_fn: it went through .detach(), .item(), numpy or "
                    "torch.no_grad()); keep the computation in torch, or pass gradient=")
            try:
                grads = torch.autograd.grad(out.reshape(()), leaves, allow_unused=True)
            except Exception as exc:
                raise CheckInputError(
                    f"gradient=None: torch.autograd could not differentiate the cost "
                    f"({type(exc).__name__}: {exc}); fix its backward, or pass gradient=") from exc
        values = [np.zeros(np.shape(v)) if g is None else g.detach().cpu().numpy()
                  for g, v in zip(grads, leaves_of(numpy_tree))]
        return _rebuild_numpy(numpy_tree, values)

    def call_gradient(self, gradient, numpy_tree):
        """A user's gradient function on the framework tree (leaves that require grad, so a
        function that calls .backward() on a module works)."""
        with self.torch.enable_grad():
            return self.run(gradient, self.tensors(numpy_tree, requires_grad=True))

    def batched(self, cost):
        """A vectorized numpy cost evaluating the user's single-point cost through vmap."""
        return _BatchedCost(self, cost)

    def vmap_call(self, cost, numpy_batch, rest):
        leaves = self.tensors(numpy_batch)
        return self.torch.func.vmap(lambda *row: self.run(cost, list(row), rest))(*leaves)

    def jacobian(self, fun, numpy_tree):
        """torch.autograd's Jacobian (outputs flattened by coordinates) at a numpy point."""
        torch = self.torch
        leaves = self.tensors(numpy_tree)

        def flat(*xs):
            out = self.run(fun, list(xs))
            return torch.cat([torch.as_tensor(y).reshape(-1) for y in leaves_of(out)])

        with torch.enable_grad():
            parts = torch.autograd.functional.jacobian(flat, tuple(leaves))
        m = parts[0].shape[0]
        return np.concatenate([p.detach().cpu().numpy().reshape(m, -1) for p in parts], axis=1)

    def to_framework(self, numpy_tree):
        """A numpy result shaped like the engine's tree as tensors like the user's params
        (their dtype and device); a module's entry is a dict by parameter name."""
        torch = self.torch
        values = iter(leaves_of(numpy_tree))

        def tensor_like(v, like):
            return torch.as_tensor(np.asarray(v, dtype=np.float64)).to(device=like.device,
                                                                        dtype=like.dtype)

        def build(t):
            if isinstance(t, torch.nn.Module):
                slot = next(s for s in self.slots if s.module is t)
                return {name: tensor_like(next(values), p) for name, p in slot.trainable}
            if isinstance(t, dict):
                return type(t)((k, build(v)) for k, v in t.items())
            if isinstance(t, (list, tuple)):
                return _like(t, [build(v) for v in t])
            if isinstance(t, torch.Tensor):
                return tensor_like(next(values), t)
            return next(values)
        return build(self.template)


class ModuleGuard:
    """A context that leaves the modules of a params tree as they were: parameters,
    buffers, requires_grad flags, train/eval modes and .grad, whatever the cost (or the
    adapter's own calls) did to them.  `.notes` says what had to be set back."""

    def __init__(self, params):
        torch = sys.modules.get("torch")
        self.modules = [] if torch is None else \
            [leaf for _, leaf in _items(params) if isinstance(leaf, torch.nn.Module)]
        self.notes = []

    def __enter__(self):
        self.saved = []
        for module in self.modules:
            self.saved.append((
                [(m, m.training) for m in module.modules()],
                [(p, p.requires_grad, None if p.grad is None else p.grad.detach().clone())
                 for p in module.parameters()],
                {k: v.detach().clone() for k, v in module.state_dict(keep_vars=True).items()
                 if hasattr(v, "detach")},
            ))
        return self

    def __exit__(self, *exc_info):
        for module, (modes, flags, state) in zip(self.modules, self.saved):
            self._restore(module, modes, flags, state)
        return False

    def _restore(self, module, modes, flags, state):
        torch = sys.modules["torch"]
        for m, training in modes:
            m.train(training)
        changed = []
        with torch.no_grad():
            current = module.state_dict(keep_vars=True)
            for key, value in state.items():
                now = current.get(key)
                if now is not None and not torch.equal(now.detach(), value):
                    now.copy_(value)
                    changed.append(key)
        for p, requires, grad in flags:
            p.requires_grad_(requires)
            if grad is None:
                p.grad = None
            elif p.grad is None or not torch.equal(p.grad, grad):
                p.grad = grad
        if changed:
            self.notes.append(f"the cost changed the module's state in place "
                              f"({_listed(changed)}); it was set back")


# --- the JAX side ----------------------------------------------------------------------------

def _x64(jax):
    """A context in which JAX keeps float64 (and complex128) values as they are."""
    enable = getattr(jax, "enable_x64", None)
    if callable(enable):
        return enable(True)
    from jax.experimental import enable_x64  # older JAX

    return enable_x64()


class JaxBridge:
    """Numpy points to JAX arrays and calls, for one params tree."""

    framework = JAX

    def __init__(self, template, widen: bool, rng_option: bool = False, seeded=False):
        jax = sys.modules["jax"]
        self.template, self.widen, self.notes = template, widen, []
        self.widened, self.narrowed, self.on_devices, self.own_dtypes = [], [], set(), []
        self.slots = ()
        self.params = self._numpy_tree(template, (), jax)

    def __getstate__(self):
        return dict(self.__dict__)

    def _numpy_tree(self, t, path, jax):
        if isinstance(t, dict):
            return type(t)((k, self._numpy_tree(v, path + (k,), jax)) for k, v in t.items())
        if isinstance(t, (list, tuple)):
            return _like(t, [self._numpy_tree(v, path + (i,), jax) for i, v in enumerate(t)])
        if not isinstance(t, jax.Array):
            self.own_dtypes.append(None)
            return t
        name = _name(path)
        kind = np.dtype(t.dtype) if t.dtype.name != "bfloat16" else None
        if kind is not None and np.issubdtype(kind, np.complexfloating):
            raise CheckInputError(f"params leaf '{name}' is a complex array ({t.dtype}); only "
                                  "real parameters are checked (split real and imaginary parts)")
        if kind is not None and not np.issubdtype(kind, np.floating):
            raise CheckInputError(f"params leaf '{name}' is a {t.dtype} array; gradients need "
                                  "floating-point leaves: convert it with .astype(float)")
        dtype, narrowed = _working_numpy_dtype(t.dtype.name, self.widen)
        if t.dtype.name in LOW_PRECISION and self.widen:
            self.widened.append(name)
        if narrowed:
            self.narrowed.append(name)
        devices = getattr(t, "devices", lambda: set())()
        self.on_devices.update(str(d) for d in devices if getattr(d, "platform", "cpu") != "cpu")
        self.own_dtypes.append(t.dtype)
        try:
            return np.asarray(t).astype(dtype)
        except Exception as exc:  # noqa: BLE001 - a deleted or unreachable buffer
            raise CheckInputError(f"params leaf '{name}': its values cannot be read "
                                  f"({type(exc).__name__}: {exc})") from exc

    def arrays(self, numpy_tree):
        import jax.numpy as jnp  # jax is loaded: its arrays are in params

        return [jnp.asarray(np.array(v)) for v in leaves_of(numpy_tree)]

    def assemble(self, leaves):
        return _rebuild_numpy(self.template, leaves)

    def run(self, fn, numpy_tree, rest=()):
        with _x64(sys.modules["jax"]):
            return _settled(fn(self.assemble(self.arrays(numpy_tree)), *rest))

    def gradient(self, cost, numpy_tree):
        jax = sys.modules["jax"]
        with _x64(jax):
            leaves = self.arrays(numpy_tree)
            try:
                grads = jax.grad(lambda xs: cost(self.assemble(xs)))(leaves)
            except Exception as exc:
                raise CheckInputError(
                    f"gradient=None: jax.grad could not differentiate the cost "
                    f"({type(exc).__name__}: {exc}); write it with jax.numpy, or pass "
                    "gradient=") from exc
            values = [np.asarray(g, dtype=np.float64) for g in grads]
        return _rebuild_numpy(numpy_tree, values)

    def call_gradient(self, gradient, numpy_tree):
        return self.run(gradient, numpy_tree)

    def batched(self, cost):
        return _BatchedCost(self, cost)

    def vmap_call(self, cost, numpy_batch, rest):
        jax = sys.modules["jax"]
        with _x64(jax):
            leaves = self.arrays(numpy_batch)
            return _settled(jax.vmap(lambda *row: cost(self.assemble(list(row)), *rest))(*leaves))

    def jacobian(self, fun, numpy_tree):
        import jax
        import jax.numpy as jnp

        with _x64(jax):
            leaves = self.arrays(numpy_tree)

            def flat(xs):
                return jnp.concatenate([jnp.ravel(y) for y in leaves_of(fun(self.assemble(xs)))])
            parts = jax.jacrev(flat)(leaves)
            m = parts[0].shape[0]
            return np.concatenate([np.asarray(p, dtype=np.float64).reshape(m, -1) for p in parts],
                                  axis=1)

    def to_framework(self, numpy_tree):
        import jax.numpy as jnp

        dtypes = iter(self.own_dtypes)
        values = [v if d is None else jnp.asarray(np.asarray(v), dtype=d)
                  for v, d in zip(leaves_of(numpy_tree), dtypes)]
        return _rebuild_numpy(numpy_tree, values)


def _settled(out):
    """JAX runs asynchronously: wait for the result inside the x64 context."""
    ready = getattr(out, "block_until_ready", None)
    return ready() if callable(ready) else out


def _rebuild_numpy(tree, values):
    """The structure of a numpy tree with its leaves replaced by values, in order."""
    it = iter(values)

    def build(t):
        if isinstance(t, dict):
            return type(t)((k, build(v)) for k, v in t.items())
        if isinstance(t, (list, tuple)):
            return _like(t, [build(v) for v in t])
        return next(it)
    return build(tree)


# --- costs the engine calls ---------------------------------------------------------------

class FrameworkCost:
    """The user's framework cost as a numpy cost: framework values in, numbers out."""

    def __init__(self, bridge, cost, scalar: bool):
        self.bridge, self.cost, self.scalar = bridge, cost, scalar
        _named_like(self, cost)

    def __call__(self, numpy_tree, *rest):
        if self.bridge.framework == TORCH:
            out = self.bridge.run(self.cost, self.bridge.tensors(numpy_tree), rest)
        else:
            out = self.bridge.run(self.cost, numpy_tree, rest)
        return _number(out) if self.scalar else _arrays(out)


class _BatchedCost:
    """A vectorized numpy cost: the user's single-point cost mapped over a batch by vmap."""

    def __init__(self, bridge, cost):
        self.bridge, self.cost = bridge, cost
        _named_like(self, cost)

    def __call__(self, numpy_batch, *rest):
        return np.asarray(_to_numpy(self.bridge.vmap_call(self.cost, numpy_batch, rest), "cost"))


# --- one check -------------------------------------------------------------------------------

class Adapted:
    """A check's framework values turned into what the engine takes, and the way back."""

    def __init__(self, bridge, cost, analytic, options, notes, extra):
        self.bridge, self.cost, self.analytic = bridge, cost, analytic
        self.options, self.notes, self.extra_evaluations = options, notes, extra

    @property
    def params(self):
        return self.bridge.params

    def finish(self, result, more_notes=()):
        """Notes and evaluations into a report; a numeric gradient back in framework types."""
        notes = self.notes + [n for n in list(self.bridge.notes) + list(more_notes)
                              if n not in self.notes]
        if hasattr(result, "notes") and hasattr(result, "evaluations"):
            result.notes[:0] = notes
            result.evaluations += self.extra_evaluations
            return result
        return self.bridge.to_framework(result)


def _first_line(exc, limit=160) -> str:
    """'Type: first line of the message', cut to about `limit` characters."""
    text = str(exc).strip().splitlines()[0] if str(exc).strip() else ""
    if len(text) > limit:
        text = text[:limit].rsplit(" ", 1)[0] + " ..."
    return f"{type(exc).__name__}: {text}"


def _try_base(bridge, cost, rest):
    """One call at the base point: (its value as numpy values, None) or (None, the error)."""
    try:
        return FrameworkCost(bridge, cost, scalar=False)(bridge.params, *rest), None
    except Exception as exc:  # noqa: BLE001 - user code
        return None, exc


def _base_value(bridges, cost, scalar, rest):
    """(bridge, value at the base point, notes): a float64 trial first, then the params'
    own precision where the cost refuses float64 (float32 data inside it, say)."""
    wide, own = bridges
    out, error = _try_base(wide, cost, rest)
    if error is None:
        bridge, notes = wide, []
    else:
        retry = _try_base(own, cost, rest) if own is not None else (None, error)
        if retry[1] is not None:
            raise CheckInputError(f"cost raised {type(error).__name__} at the base point: "
                                  f"{error}") from error
        bridge, out = own, retry[0]
        notes = [f"the cost fails on float64 copies of params ({_first_line(error)}), so it "
                 "was checked in the params' own precision, where agreement means less; give "
                 "its data the dtype of params (e.g. .double()) for a float64 check"]
    if scalar and (isinstance(out, (dict, list, tuple)) or np.size(out) != 1):
        got = (f"a {type(out).__name__}" if isinstance(out, (dict, list, tuple)) else
               f"a {bridge.framework} value with {np.size(out)} elements (shape "
               f"{tuple(np.shape(out))})")
        raise CheckInputError(f"cost: returned {got} at the base point; expected one number: a "
                              "0-d tensor or array (reduce it with .sum() or .mean())")
    return bridge, out, notes


def _precision_notes(bridge, keep_precision):
    notes = []
    if bridge.widened and bridge.widen:
        notes.append(f"{bridge.framework} values in lower precision "
                     f"({_listed(bridge.widened)}) "
                     "were checked on float64 copies, so the numeric derivatives are sharp; "
                     "pass keep_precision=True to check the cost in their own precision")
    if bridge.narrowed:
        notes.append(f"bfloat16 values ({_listed(bridge.narrowed)}) have no numpy type: "
                     "they were checked in float32")
    if bridge.on_devices:
        notes.append(f"params on {', '.join(sorted(bridge.on_devices))} were checked there: every "
                     "evaluation copies its point to the device and the value back")
    return notes


def adapt(kind, cost, params, analytic, *, scalar, analytic_name, keep_precision, options,
          rng_option=False) -> Adapted:
    """The engine's view of a check on framework values.

    Parameters
    ----------
    kind : {'torch', 'jax'}
        The framework of params (see `framework_of`).
    cost : callable
        The user's cost (or vector function) on framework values.
    params : object
        The user's params tree.
    analytic : None, callable or value
        The gradient (or Jacobian): None takes the framework's own derivative.
    scalar : bool
        True for a cost (one number), False for a vector function (a Jacobian check).
    analytic_name : str or None
        'gradient', 'jacobian', or None where the entry takes no analytic side.
    keep_precision : bool
        Evaluate in the params' own float dtype instead of float64 copies.
    options : dict
        The entry's other options (vectorized is read here).

    Returns
    -------
    Adapted
        `.cost`, `.params`, `.analytic` for the engine, `.options` (vectorized settled),
        and `.finish(result)` for the way back.

    Raises
    ------
    CheckInputError
        For bad framework input: a non-scalar result, an active dropout layer, an
        unreadable device, a cost that fails at the base point.
    """
    if not callable(cost):
        raise CheckInputError(f"cost: expected a callable taking params, got "
                              f"{type(cost).__name__}")
    make = TorchBridge if kind == TORCH else JaxBridge
    original = cost          # the engine calls it with its own generator (with_rng)
    seeded = bool(options.get("with_rng"))
    wide = make(params, widen=not keep_precision, rng_option=rng_option, seeded=seeded)
    own = make(params, widen=False, rng_option=rng_option, seeded=seeded) \
        if wide.widened else None
    draw = engine_draw(options.get("seed")) if options.get("with_rng") else None
    if draw is not None:  # the cost takes (params, rng): the engine's draw here too
        cost = functools.partial(_with_generator, cost, draw)
        options = dict(options, seed=draw)   # the engine then seeds with the same draw
    bridge, value, notes = _base_value((wide, own), cost, scalar, ())
    notes = _precision_notes(bridge, keep_precision) + notes
    extra = 1
    options = dict(options)
    engine_cost = FrameworkCost(bridge, original, scalar)
    if scalar and options.get("vectorized") and draw is None:  # the engine refuses with_rng
        engine_cost, used, note = _vectorized(bridge, cost, value)
        extra += 1
        options["vectorized"] = used
        if note:
            notes.append(note)
    if draw is not None and callable(analytic):
        analytic = functools.partial(_with_generator, analytic, draw)
    analytic_value = _analytic(bridge, cost, analytic, analytic_name)
    if analytic is None and analytic_name is not None:
        differentiator = "torch.autograd" if kind == TORCH else (
            "jax.grad" if scalar else "jax.jacrev")
        notes.append(f"{analytic_name}=None: the analytic side is {differentiator}'s, through "
                     "any custom derivative rule the cost uses")
    return Adapted(bridge, engine_cost, analytic_value, options, notes, extra)


def _vectorized(bridge, cost, value):
    """(engine cost, vectorized flag, note): vmap where the cost allows it, else plain calls."""
    tool = "torch.func.vmap" if bridge.framework == TORCH else "jax.vmap"
    batched = bridge.batched(cost)
    batch = _rebuild_numpy(bridge.params, [np.stack([np.asarray(v)] * 2)
                                           for v in leaves_of(bridge.params)])
    try:
        got = batched(batch)
        if np.shape(got) != (2,):
            raise ValueError(f"it returned shape {np.shape(got)} for a batch of 2")
        plain = float(np.real(value))
        if not np.allclose(got.astype(float), plain, rtol=VMAP_AGREEMENT, atol=0):
            raise ValueError(f"it returned {got[0]!r} where a plain call returns {plain!r}")
    except Exception as exc:  # noqa: BLE001 - user code under a transform
        return (FrameworkCost(bridge, cost, True), False,
                f"vectorized=True: {tool} could not batch the cost ({_first_line(exc)}); it was "
                "evaluated one point at a time")
    return batched, True, None


def _analytic(bridge, cost, analytic, analytic_name):
    """The analytic gradient (or Jacobian) at the base point, as numpy values."""
    if analytic_name is None:
        return None
    if analytic is None:
        if analytic_name == "jacobian":
            try:
                return bridge.jacobian(cost, bridge.params)
            except Exception as exc:
                raise CheckInputError(
                    f"jacobian=None: {bridge.framework} could not differentiate the function "
                    f"({type(exc).__name__}: {exc}); pass jacobian=") from exc
        return bridge.gradient(cost, bridge.params)
    if callable(analytic):
        try:
            value = bridge.call_gradient(analytic, bridge.params)
        except Exception as exc:
            raise CheckInputError(f"{analytic_name} function raised {type(exc).__name__} at the "
                                  f"base point: {exc}") from exc
        return _arrays(value)
    return _arrays(analytic)


def engine_draw(seed) -> int:
    """The seed of the generator the engine hands a with_rng cost at every call
    (evaluate.draw_seed; the caller passes it on as the engine's seed, so that both sides
    see one draw also where no seed was given)."""
    return draw_seed(seed)


def _with_generator(fun, draw, params):
    """fun(params, rng) with a fresh generator seeded by `draw` (as evaluate.SeededCall)."""
    return fun(params, np.random.default_rng(draw))


# --- the entries -------------------------------------------------------------------------------

def _with_keep_precision(signature):
    """The entry's signature with the keep_precision option (before any **options)."""
    params = list(signature.parameters.values())
    if "keep_precision" in signature.parameters:
        return signature
    option = inspect.Parameter("keep_precision", inspect.Parameter.KEYWORD_ONLY, default=False)
    at = next((i for i, p in enumerate(params) if p.kind == p.VAR_KEYWORD), len(params))
    return signature.replace(parameters=params[:at] + [option] + params[at:])


KEEP_PRECISION_DOC = """
    keep_precision : bool, default False
        For params holding torch tensors, a torch.nn.Module or JAX arrays: evaluate the
        cost in their own float dtype (float32 stays float32, under the engine's rules
        for lower precision) instead of on float64 copies.
"""


def takes_framework_values(entry):
    """Let a public entry take PyTorch and JAX values (the adapter in front of the engine).

    The entry runs unchanged on plain numpy input.  When params hold torch tensors, a
    module or JAX arrays, the check runs on a numpy view of them (see `adapt`), and
    its report gets notes on what was converted; a numeric gradient comes back in the
    framework's types.  Adds the keyword option ``keep_precision``.

    Parameters
    ----------
    entry : callable
        ``entry(cost, params, [gradient or jacobian], ...)``.

    Returns
    -------
    callable
        The entry, taking framework values too.

    Examples
    --------
    >>> import numpy as np
    >>> def total(cost, params):
    ...     return cost(params)
    >>> takes_framework_values(total)(np.sum, np.ones(3))
    np.float64(3.0)
    """
    signature = inspect.signature(entry)
    names = list(signature.parameters)
    third = signature.parameters[names[2]] if len(names) > 2 else None
    analytic_name = third.name if third is not None and \
        third.kind == third.POSITIONAL_OR_KEYWORD else None
    scalar = analytic_name != "jacobian"
    rng_option = "with_rng" in signature.parameters

    @functools.wraps(entry)
    def checked(*args, keep_precision=False, **kwargs):
        if not isinstance(keep_precision, (bool, np.bool_)):
            raise CheckInputError(f"keep_precision: expected True or False, got "
                                  f"{keep_precision!r} ({type(keep_precision).__name__})")
        if "torch" not in sys.modules and "jax" not in sys.modules:
            return entry(*args, **kwargs)
        bound = signature.bind(*args, **kwargs)
        arguments = bound.arguments
        cost, params = arguments[names[0]], arguments[names[1]]
        options = _options_of(arguments, signature)
        kind = framework_of(params)
        if kind is None:  # numpy params; a cost may still return framework values
            if callable(cost):
                gradient_needed = analytic_name if analytic_name is not None and \
                    arguments.get(analytic_name) is None else ""
                arguments[names[0]] = NumpyOutputs(cost, scalar and not options.get(
                    "vectorized"), gradient_needed)
                if analytic_name is not None and arguments.get(analytic_name) is not None:
                    arguments[analytic_name] = _numpy_analytic(arguments[analytic_name])
            return entry(*bound.args, **bound.kwargs)
        with ModuleGuard(params) as guard:
            adapted = adapt(kind, cost, params, arguments.get(analytic_name), scalar=scalar,
                            analytic_name=analytic_name, keep_precision=bool(keep_precision),
                            options=options, rng_option=rng_option)
            arguments[names[0]], arguments[names[1]] = adapted.cost, adapted.params
            if analytic_name is not None:
                arguments[analytic_name] = adapted.analytic
            if "vectorized" in options:
                _set_option(arguments, signature, "vectorized", adapted.options["vectorized"])
            result = entry(*bound.args, **bound.kwargs)
        return adapted.finish(result, guard.notes)

    checked.__signature__ = _with_keep_precision(signature)
    if checked.__doc__ and "keep_precision" not in checked.__doc__:
        checked.__doc__ = checked.__doc__.rstrip() + "\n" + KEEP_PRECISION_DOC
    return checked


def _numpy_analytic(analytic):
    """A gradient function or value of numpy params whose framework outputs become numpy."""
    if callable(analytic):
        return lambda params, *rest: _arrays(analytic(params, *rest))
    return _arrays(analytic)


def _options_of(arguments, signature) -> dict:
    """The keyword options of a bound call, **options included."""
    out = {}
    for name, p in signature.parameters.items():
        if name not in arguments:
            continue
        if p.kind == p.VAR_KEYWORD:
            out.update(arguments[name])
        elif p.kind == p.KEYWORD_ONLY:
            out[name] = arguments[name]
    return out


def _set_option(arguments, signature, name, value):
    if name in signature.parameters:
        arguments[name] = value
        return
    for p in signature.parameters.values():
        if p.kind == p.VAR_KEYWORD and p.name in arguments:
            arguments[p.name][name] = value


# --- files -------------------------------------------------------------------------------------

def load_torch_params(path):
    """Tensors saved with torch.save, read without running pickled code.

    `torch.load(..., weights_only=True)` accepts tensors, numbers and dict / list /
    tuple nests of them (a state dict), and refuses any other pickled object; the
    tensors land on the CPU whatever device they were saved from.  `.npz` stays the
    portable way to pass params.

    Parameters
    ----------
    path : str or os.PathLike
        A `.pt` / `.pth` file.

    Returns
    -------
    torch.Tensor or dict
        The saved tensor, or a plain dict (a state dict's OrderedDict becomes a dict).

    Raises
    ------
    CheckInputError
        When torch is missing, the file is absent or unreadable, it holds objects other
        than tensors and numbers, or it holds no floating-point tensor.

    Examples
    --------
    >>> import tempfile, os, torch
    >>> path = os.path.join(tempfile.mkdtemp(), "start.pt")
    >>> torch.save({"w": torch.ones(2)}, path)
    >>> load_torch_params(path)["w"].shape
    torch.Size([2])
    """
    p = Path(path)
    if p.is_file():
        with open(p, "rb") as handle:   # torch.save writes a zip archive; torch.load would
            if handle.read(2) != b"PK":  # take anything else for a legacy pickle
                raise CheckInputError(f"--params: {p.name} is not a PyTorch file saved by "
                                      "torch.save (no zip archive); save a state dict with "
                                      "torch.save, or the params with numpy.savez")
    try:
        import torch
    except ImportError as exc:
        raise CheckInputError(f"--params: reading {p.name} needs PyTorch, which is not installed "
                              "(pip install torch; see the README for a CPU build), or save the "
                              "params with numpy.savez") from exc
    if not p.is_file():
        raise CheckInputError(f"--params: no such file: {path}")
    try:
        loaded = torch.load(p, map_location="cpu", weights_only=True)
    except pickle.UnpicklingError as exc:
        raise CheckInputError(
            f"--params: {path} holds Python objects other than tensors and numbers, which are "
            "refused (unpickling them runs code); save a state dict (module.state_dict()) or "
            "plain tensors with torch.save") from exc
    except Exception as exc:  # noqa: BLE001 - a corrupt or foreign file
        raise CheckInputError(f"--params: cannot read {path}: {_first_line(exc)}") from exc
    loaded = _plain_containers(loaded)
    if not any(isinstance(x, torch.Tensor) and x.is_floating_point() for x in leaves_of(loaded)):
        raise CheckInputError(f"--params: {path} holds no floating-point tensor; expected a "
                              "tensor or a state dict of them")
    return loaded


def _plain_containers(tree):
    """OrderedDicts (state dicts) as plain dicts, recursively."""
    if isinstance(tree, dict):
        return {k: _plain_containers(v) for k, v in tree.items()}
    if isinstance(tree, (list, tuple)):
        return _like(tree, [_plain_containers(v) for v in tree])
    return tree
