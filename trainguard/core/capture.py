"""Recording a training run: the object behind the `trajectory` fixture.

`Trajectory` knows nothing about pytest. It validates what the test hands it at the
moment it is handed over (so a mistake points at the offending line) and builds a
`Run` that the golden store and the comparison consume.
"""

from __future__ import annotations

import functools
import numbers
from dataclasses import replace
from typing import Any, Iterator, Mapping

import numpy as np

from . import checksum
from .checksum import is_tensor as _is_tensor
from .errors import UsageError
from .records import MetricSeries, Run, TensorRecord
from .text import nested_items

#: Default for `trainguard_max_values`: tensors up to this many elements keep their values.
DEFAULT_MAX_VALUES = 65_536


def _scalar(name: str, value: Any, step: int) -> float:
    __tracebackhide__ = True
    if _is_tensor(value):
        if value.numel() != 1 or value.dim() > 1:
            raise UsageError(
                f"trajectory.log(step={step}, {name}=...): got a tensor of shape {tuple(value.shape)}; "
                f"metrics are scalars. Log a reduction such as {name}=t.mean() or {name}=t.item()."
            )
        if value.is_complex():
            raise UsageError(f"trajectory.log(step={step}, {name}=...): complex values are not metrics")
        return float(value.detach().reshape(()).item())
    if isinstance(value, np.ndarray):
        if value.size != 1 or value.ndim > 1:
            raise UsageError(
                f"trajectory.log(step={step}, {name}=...): got an array of shape {value.shape}; metrics are scalars"
            )
        value = value.reshape(()).item()
    if isinstance(value, (bool, np.bool_)):
        return float(value)
    if isinstance(value, numbers.Real):
        return float(value)
    raise UsageError(
        f"trajectory.log(step={step}, {name}=...): {type(value).__name__} is not a scalar metric; "
        "pass a Python number, a NumPy scalar or a one-element tensor"
    )


class Trajectory:
    """Collects metrics by step and the final training state of one guarded test."""

    def __init__(self, max_values: int = DEFAULT_MAX_VALUES, label: str = "trajectory", light_trace: bool = False) -> None:
        self.max_values = max_values
        #: `watch` keeps per-event fingerprints only (a plain check); see `trace` for the two depths.
        self.light_trace = light_trace
        #: The golden's state records (a light read, see `store.GoldenStore.read`), when a check knows
        #: them before the body runs: an entry whose SHA-256 matches is recorded by hashing alone,
        #: taking statistics and sketch from the golden (same bits, same derived values), so a check
        #: pays for hashing and not for statistics, sketches or float64 copies of stored values.
        self.known: Mapping[str, TensorRecord] | None = None
        self._label = label
        self._steps: dict[str, list[int]] = {}
        self._values: dict[str, list[float]] = {}
        self._tensors: dict[str, TensorRecord] = {}
        self._names_by_param: dict[int, str] = {}
        self._state_calls = 0
        self._tracer: Any = None

    # -- metrics -------------------------------------------------------------------
    def log(self, step: int, **metrics: Any) -> None:
        """Record scalar metrics at an integer training step.

        Parameters
        ----------
        step : int
            The training step (a Python or NumPy integer, or a one-element integer tensor).
            Steps must strictly increase for each metric.
        **metrics
            Metric name -> a Python number, NumPy scalar or one-element tensor; stored as float64.

        Raises
        ------
        UsageError
            A non-integer step, no metrics, a non-scalar value, or a repeated or decreasing
            step; raised at the offending call, so the traceback points at the test's line.

        Examples
        --------
        >>> traj = Trajectory()
        >>> traj.log(0, loss=0.93, lr=0.05)
        >>> traj.log(1, loss=0.71, lr=0.05)
        >>> traj.to_run().metrics["loss"].values.tolist()
        [0.93, 0.71]
        """
        __tracebackhide__ = True
        if isinstance(step, bool) or not isinstance(step, (numbers.Integral,)) and not (
            _is_tensor(step) and step.numel() == 1 and not step.is_floating_point()
        ):
            raise UsageError(f"trajectory.log: step must be an integer, got {step!r}")
        step = int(step)
        if not metrics:
            raise UsageError(f"trajectory.log(step={step}): no metrics given; write e.g. trajectory.log({step}, loss=loss)")
        converted = {}
        for name, value in metrics.items():  # a loop, not a comprehension: its frame could not hide itself
            converted[name] = _scalar(name, value, step)
        for name in converted:
            steps = self._steps.get(name)
            if steps:
                last = steps[-1]
                if step == last:
                    raise UsageError(f"trajectory.log: metric {name!r} was already logged at step {step}; each step once")
                if step < last:
                    raise UsageError(
                        f"trajectory.log: metric {name!r} went back from step {last} to step {step}; "
                        "steps must increase for each metric"
                    )
        for name, value in converted.items():
            self._steps.setdefault(name, []).append(step)
            self._values.setdefault(name, []).append(value)

    # -- final state ---------------------------------------------------------------
    def state(self, model: Any = None, optimizer: Any = None, **named: Any) -> None:
        """Record the final state: a module's parameters and buffers, an optimizer's state, named tensors.

        Parameters
        ----------
        model : torch.nn.Module, optional
            Every parameter and buffer, under its `named_parameters()` / `named_buffers()` name.
        optimizer : torch.optim.Optimizer, optional
            Every state entry, named `<parameter name>.<state key>` (lists flattened with an
            index), and the numeric hyperparameters of each param group (`param_groups.0.lr`).
        **named
            Tensors, NumPy arrays, numbers, or further modules and optimizers, which are
            recorded under the keyword as prefix (`critic=d, d_opt=opt_d`).

        Raises
        ------
        UsageError
            Nothing to record, a value of an unsupported type, or two entries of the same name.

        Examples
        --------
        >>> import torch                                                  # doctest: +SKIP
        >>> model = torch.nn.Linear(3, 1)                                 # doctest: +SKIP
        >>> opt = torch.optim.SGD(model.parameters(), lr=0.1, momentum=0.9)  # doctest: +SKIP
        >>> trajectory.state(model, optimizer=opt, oven_temperature=torch.tensor(180.0))  # doctest: +SKIP
        """
        __tracebackhide__ = True
        import torch

        if model is None and optimizer is None and not named:
            raise UsageError(
                "trajectory.state(): nothing to record; pass a model, an optimizer=..., or named tensors"
            )
        if model is not None and not isinstance(model, torch.nn.Module):
            raise UsageError(f"trajectory.state: model must be a torch.nn.Module, got {type(model).__name__}")
        if optimizer is not None and not isinstance(optimizer, torch.optim.Optimizer):
            raise UsageError(
                f"trajectory.state: optimizer must be a torch.optim.Optimizer, got {type(optimizer).__name__}"
            )
        self._state_calls += 1
        pending: list[tuple[str, str, Any]] = []
        # Register every module's parameter names first, so optimizers anywhere in the call resolve them.
        if model is not None:
            self._learn_names(model, "")
        for key, value in named.items():
            if isinstance(value, torch.nn.Module):
                self._learn_names(value, key + ".")
        if model is not None:
            pending.extend(_module_entries(model, ""))
        if optimizer is not None:
            pending.extend(self._optimizer_entries(optimizer, ""))
        for key, value in named.items():
            if isinstance(value, torch.nn.Module):
                pending.extend(_module_entries(value, key + "."))
            elif isinstance(value, torch.optim.Optimizer):
                pending.extend(self._optimizer_entries(value, key + "."))
            elif _is_tensor(value) or isinstance(value, (np.ndarray, np.generic, numbers.Number)):
                pending.append((key, "named", value))
            else:
                raise UsageError(
                    f"trajectory.state({key}=...): {type(value).__name__} cannot be recorded; "
                    "give a tensor, a NumPy array, a number, a module or an optimizer"
                )
        seen: set[str] = set()
        for name, _, _ in pending:
            if name in self._tensors or name in seen:
                raise UsageError(
                    f"trajectory.state: two entries are named {name!r}; rename the keyword argument "
                    "or record the second model/optimizer under a keyword (e.g. critic=model2)"
                )
            seen.add(name)
        for name, kind, value in pending:
            self._tensors[name] = self._describe(name, kind, value)

    def _learn_names(self, module: Any, prefix: str) -> None:
        for name, param in module.named_parameters():
            self._names_by_param.setdefault(id(param), prefix + name)

    def _optimizer_entries(self, optimizer: Any, prefix: str) -> Iterator[tuple[str, str, Any]]:
        return optimizer_entries(optimizer, prefix, self._names_by_param)

    def _describe(self, name: str, kind: str, value: Any) -> TensorRecord:
        if isinstance(value, np.generic):  # a NumPy scalar keeps its dtype: float32 -> float64 is a change
            array: Any = np.asarray(value)
            if array.dtype == object or array.dtype.kind not in "biufc":
                raise UsageError(f"trajectory.state({name}=...): scalar dtype {array.dtype} is not numeric")
        elif isinstance(value, bool):
            array = np.asarray(value, dtype=np.bool_)
        elif isinstance(value, numbers.Integral):
            array = np.asarray(int(value), dtype=np.int64)
        elif isinstance(value, numbers.Real):
            array = np.asarray(float(value), dtype=np.float64)
        elif isinstance(value, (np.ndarray, np.generic)):
            array = np.asarray(value)
            if array.dtype == object or array.dtype.kind not in "biufc":
                raise UsageError(f"trajectory.state({name}=...): array dtype {array.dtype} is not numeric")
        else:
            array = value
        if _is_tensor(array):
            dtype = str(array.dtype).replace("torch.", "")
            shape = tuple(int(d) for d in array.shape)
            numel = array.numel()
        else:
            dtype = str(array.dtype)
            shape = tuple(int(d) for d in array.shape)
            numel = int(array.size)
        keep_values = numel <= self.max_values
        known = self.known.get(name) if self.known else None
        if known is not None and known.dtype == dtype and known.shape == shape and known.values is None:
            # The golden, read light, has this entry's checksum, statistics and sketch: when the bits
            # match, they are the golden's; only the stored values are missing (`guard.settle` takes
            # them from the golden if the run is ever written).
            digest = checksum.sha256_hex(array)
            if digest == known.sha256 and (keep_values or (known.sketch is not None
                                                           and len(known.sketch) == checksum.STATE_SKETCH)):
                return replace(known, name=name, kind=kind)
        if keep_values:  # the float64 copy that is stored also gives the statistics: one conversion, not two
            values = checksum.values_float64(array)
            digest, (st, sketch) = checksum.sha256_hex(array), checksum.summarize(values)
        else:
            values = None
            # One call: for large tensors the digest is computed in a background thread while the
            # statistics and sketch are computed here (same results as separate calls).
            digest, st, sketch = checksum.describe(array, checksum.STATE_SKETCH)
        return TensorRecord(
            name=name,
            kind=kind,
            dtype=dtype,
            shape=shape,
            sha256=digest,
            min=st.min,
            max=st.max,
            mean=st.mean,
            l2=st.l2,
            nonfinite=st.nonfinite,
            values=values,
            sketch=sketch,
        )

    # -- per-step trace ------------------------------------------------------------
    def watch(self, *pair: Any, **named: Any) -> None:
        """Trace every training step: initial weights, inputs, outputs and loss, gradients, updates.

        The trace lets a failure report name the first step and stage (init, data, forward,
        backward, update) where the run departs from its golden. Call it once, before training.
        Watching changes nothing that `trajectory.state` records: names there depend only on
        what `state` is given, so adding or removing `watch` leaves a golden's state as it was.

        Parameters
        ----------
        *pair : torch.nn.Module, torch.optim.Optimizer
            One network and its optimizer, traced under their own names (`fc1.weight`).
        **named : module, or (module, optimizer)
            Several networks, each under its keyword as prefix, the way `trajectory.state`
            names them: `watch(generator=(G, g_opt), discriminator=(D, d_opt))`. A module
            alone (a frozen teacher, an encoder another optimizer steps) is traced too.

        Raises
        ------
        UsageError
            Called twice, nothing or no optimizer given, or something that is not a module
            and an optimizer.

        Examples
        --------
        >>> trajectory.watch(model, opt)   # doctest: +SKIP
        >>> trajectory.watch(generator=(G, g_opt), discriminator=(D, d_opt))   # doctest: +SKIP
        """
        __tracebackhide__ = True
        import torch

        from .trace import Tracer, Watched

        if self._tracer is not None:
            raise UsageError("trajectory.watch: already watching; call it once per test")
        watched: list[Watched] = []
        if pair:
            if named:
                raise UsageError("trajectory.watch: give either (model, optimizer) or keyword=(module, optimizer) "
                                 "pairs, not both")
            if len(pair) != 2:
                raise UsageError(f"trajectory.watch: expected (model, optimizer), got {len(pair)} positional "
                                 "argument(s); several networks go as keywords: watch(generator=(G, g_opt), ...)")
            watched.append(Watched("", *pair))
        for key, value in named.items():
            if isinstance(value, tuple) and len(value) == 2:
                watched.append(Watched(key + ".", *value))
            elif isinstance(value, torch.nn.Module):
                watched.append(Watched(key + ".", value, None))
            else:
                raise UsageError(f"trajectory.watch({key}=...): give a module or a (module, optimizer) pair, "
                                 f"got {type(value).__name__}")
        if not watched:
            raise UsageError("trajectory.watch(): nothing to watch; pass (model, optimizer) or "
                             "keyword=(module, optimizer) pairs")
        for w in watched:
            where = f"trajectory.watch({w.prefix[:-1]}=...)" if w.prefix else "trajectory.watch"
            if not isinstance(w.module, torch.nn.Module):
                raise UsageError(f"{where}: model must be a torch.nn.Module, got {type(w.module).__name__}")
            if w.optimizer is not None and not isinstance(w.optimizer, torch.optim.Optimizer):
                raise UsageError(
                    f"{where}: optimizer must be a torch.optim.Optimizer, got {type(w.optimizer).__name__}")
        if all(w.optimizer is None for w in watched):
            raise UsageError("trajectory.watch: no optimizer given; a training step ends when the watched "
                             "optimizers have stepped, so pass at least one (module, optimizer) pair")
        self._tracer = Tracer(watched, state_entries=functools.partial(optimizer_entries, hyperparameters=False),
                              light=self.light_trace)

    def close(self) -> None:
        """Remove the trace's hooks (the fixture calls this after every test)."""
        if self._tracer is not None:
            self._tracer.close()

    # -- result --------------------------------------------------------------------
    def to_run(self) -> Run:
        metrics = {
            name: MetricSeries(np.asarray(self._steps[name], dtype=np.int64), np.asarray(self._values[name]))
            for name in sorted(self._steps)
        }
        tensors = {name: self._tensors[name] for name in sorted(self._tensors)}
        tracer = self._tracer
        trace = list(tracer.entries) if tracer is not None and not tracer.light else None
        prints = list(tracer.prints) if tracer is not None else None
        return Run(metrics=metrics, tensors=tensors, trace=trace, prints=prints)


def optimizer_entries(optimizer: Any, prefix: str, names: Mapping[int, str],
                      hyperparameters: bool = True) -> Iterator[tuple[str, str, Any]]:
    """An optimizer's numeric hyperparameters per param group, then its state per parameter.

    `names` maps id(parameter) to its name; parameters it does not know are `group<g>.param<p>`.
    The trace, which records the state after every step, leaves hyperparameters out.
    """
    for g, group in enumerate(optimizer.param_groups):
        for key in (sorted(group) if hyperparameters else ()):
            if key == "params":
                continue
            yield from _hyper_entries(f"{prefix}param_groups.{g}.{key}", group[key])
        for p, param in enumerate(group["params"]):
            pname = names.get(id(param), f"group{g}.param{p}")
            for key, value in sorted(optimizer.state.get(param, {}).items(), key=lambda kv: str(kv[0])):
                yield from _state_entries(f"{prefix}{pname}.{key}", value)


def _module_entries(module: Any, prefix: str) -> Iterator[tuple[str, str, Any]]:
    for name, param in module.named_parameters():
        yield prefix + name, "parameter", param
    for name, buf in module.named_buffers():
        yield prefix + name, "buffer", buf


def _hyper_entries(name: str, value: Any) -> Iterator[tuple[str, str, Any]]:
    """Numeric optimizer hyperparameters (lr, momentum, betas...): flags and None are skipped."""
    if isinstance(value, bool) or value is None:
        return
    if isinstance(value, numbers.Real):
        # As float64 always: Adam's default weight_decay is the int 0, AdamW's the float 0.0,
        # and the same number must not read as a dtype change.
        yield name, "hyperparameter", float(value)
    elif _is_tensor(value) and value.numel() == 1:
        yield name, "hyperparameter", value
    elif isinstance(value, (tuple, list)):
        for i, item in enumerate(value):
            yield from _hyper_entries(f"{name}.{i}", item)


def _state_entries(name: str, value: Any) -> Iterator[tuple[str, str, Any]]:
    """Optimizer state: tensors and numbers, lists (L-BFGS history) flattened with an index."""
    for key, item in nested_items(name, value, _is_state_value):
        yield key, "optimizer", item


def _is_state_value(value: Any) -> bool:
    return _is_tensor(value) or isinstance(value, (numbers.Number, np.ndarray))
