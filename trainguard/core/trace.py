"""Per-step trace: checksums of every event of every training step, in the order they happen.

"The loss differs at step 37" does not say whether the data, the model, autograd or the
optimizer changed. A trace records, for each training step, one event per thing that
happens, each in one stage:

- `init` (step 0 only): every parameter and buffer of every watched module as it was when
  `watch` was called, so a changed initialisation is reported as such;
- `data`: the inputs of one call of a watched module;
- `forward`: the outputs of that call, or a loss that `backward()` is called on;
- `backward`: the gradients of the watched parameters right after one `backward()` (each
  backward is its own event, so a GAN's three backwards per step are three events), and
  again before an optimizer step for gradients changed since (clipping, unscaling);
- `update`: one optimizer's parameters and state right after its step.

Events are numbered in call order within the step (the `call` column); a step ends when
every watched optimizer has stepped since the last one ended (a critic stepped five times
per generator step is five update events of one step). Comparing two traces event by event
finds the first event where two runs part, which names the culprit.

Two depths. A **full** trace (at bless, with `--trainguard-repeat`, with `--trainguard-full-trace`)
keeps one `TraceEntry` per tensor: SHA-256, statistics, a 16-value sketch. A **light** trace (a
plain check) keeps one XXH3-64 fingerprint per event over the names, dtypes, shapes of its
tensors and the bytes of the weights, losses and updated parameters (see `_fingerprint`): a check that finds the run identical needs no more,
and one that does not re-runs the test body with the full trace to name the culprit. A full
trace computes the same fingerprints, so the re-run can prove it reproduced the first run.

Hooks used: forward pre-hooks and forward hooks on each watched module, step pre- and
post-hooks on each watched optimizer, and a wrapper around `torch.Tensor.backward` (to see
the loss and the gradients it produced; removed after the test). Closure optimizers (L-BFGS)
need nothing special: each evaluation's forward and backward are events in call order.
"""

from __future__ import annotations

from typing import Any, Callable, Iterator, Mapping

import numpy as np

from . import checksum
from .errors import UsageError
from .records import EventPrint, TraceEntry
from .text import nested_items


def _fingerprinter() -> Callable[[], Any]:
    try:
        import xxhash

        return xxhash.xxh3_64
    except ImportError:  # pragma: no cover - a dependency; blake2b keeps traces working, slower
        import hashlib

        return lambda: hashlib.blake2b(digest_size=8)


def _flatten(prefix: str, value: Any) -> Iterator[tuple[str, Any]]:
    return nested_items(prefix, value, checksum.is_tensor)


class Watched:
    """One watched network: a keyword (the name prefix), a module and its optimizer, either may be None."""

    def __init__(self, prefix: str, module: Any, optimizer: Any) -> None:
        self.prefix, self.module, self.optimizer = prefix, module, optimizer


class Tracer:
    """Hooks watched modules and optimizers and records one `TraceEntry` per tensor per event."""

    _active: Tracer | None = None

    def __init__(self, watched: list[Watched],
                 state_entries: Callable[[Any, str, Mapping[int, str]], Iterator[tuple[str, str, Any]]],
                 light: bool = False) -> None:
        import torch

        if Tracer._active is not None:
            raise UsageError("trajectory.watch: a trace is already running in this process; watch once per test")
        self.light = light
        self.entries: list[TraceEntry] = []
        self.prints: list[EventPrint] = []  # one fingerprint per event, light or full
        self._new_print = _fingerprinter()
        self._print = self._new_print()
        self._stage = ""
        self._headers: dict[tuple[str, Any, Any], bytes] = {}  # fingerprint header per (name, dtype, shape)
        self._plans: dict[int, tuple[list[int], list[tuple[str, dict[Any, Any], Any]] | None]] = {}
        self.step = 0
        self._seq = 0
        self._event = 0
        self._watched = watched
        self._state_entries = state_entries
        self._names: dict[int, str] = {}
        self._params: list[Any] = []
        for w in watched:
            if w.module is not None:
                for name, param in w.module.named_parameters():
                    if id(param) not in self._names:
                        self._names[id(param)] = w.prefix + name
                        self._params.append(param)
        for w in watched:
            if w.optimizer is not None:
                for g, group in enumerate(w.optimizer.param_groups):
                    for p, param in enumerate(group["params"]):
                        if id(param) not in self._names:
                            self._names[id(param)] = f"{w.prefix}group{g}.param{p}"
                            self._params.append(param)
        self._optimizers = {id(w.optimizer): w for w in watched if w.optimizer is not None}
        self._stepped: set[int] = set()
        self._calls: dict[int, int] = {}  # forward calls per module within the step
        self._losses = 0
        self._backwards = 0
        self._grads_seen: dict[int, tuple[int, int]] = {}  # param id -> (id of grad, its version) last recorded
        self._record_init()
        self._handles: list[Any] = []
        for w in watched:
            if w.module is not None:
                self._handles += [
                    w.module.register_forward_pre_hook(self._input_hook(w), with_kwargs=True),
                    w.module.register_forward_hook(self._output_hook(w), with_kwargs=True),
                ]
            if w.optimizer is not None:
                self._handles += [w.optimizer.register_step_pre_hook(self._before_step),
                                  w.optimizer.register_step_post_hook(self._after_step)]
        self._original_backward = torch.Tensor.backward
        tracer = self
        original = self._original_backward

        def backward(tensor: Any, *args: Any, **kwargs: Any) -> Any:
            tracer._on_loss(tensor)
            result = original(tensor, *args, **kwargs)
            tracer._on_backward()
            return result

        backward.__doc__ = original.__doc__
        torch.Tensor.backward = backward  # type: ignore[method-assign]
        Tracer._active = self

    # -- recording -------------------------------------------------------------------
    def _add(self, stage: str, name: str, tensor: Any, content: bool = False) -> None:
        if tensor.requires_grad:
            tensor = tensor.detach()
        self._stage = stage
        self._fingerprint(name, tensor, content)
        if self.light:
            self._seq += 1
            return
        digest, st, sketch = checksum.describe(tensor, checksum.TRACE_SKETCH)
        self.entries.append(TraceEntry(
            self.step, stage, self._seq, self._event, name, str(tensor.dtype).replace("torch.", ""),
            tuple(int(d) for d in tensor.shape), digest,
            st.min, st.max, st.mean, st.l2, st.nonfinite, sketch,
        ))
        self._seq += 1

    def _fingerprint(self, name: str, tensor: Any, content: bool) -> None:
        """Feed one tensor to the event's fingerprint: name, dtype, shape, and with `content` its bytes
        (in place for a contiguous CPU tensor NumPy can view; else as `checksum.tensor_bytes` gives them).

        Bytes are fed for the weights at `watch`, every loss, and the parameters after every update:
        inputs, outputs, gradients and optimizer state all reach the next parameters, so a run that
        takes another path differs there within the step, at a quarter of the bytes. The fingerprint
        only has to tell whether two runs of one body took the same path; the full trace of the
        second run says where a run departs from its golden."""
        h = self._print
        key = (name, tensor.dtype, tensor.shape)
        header = self._headers.get(key)
        if header is None:
            header = self._headers[key] = f"{name}\0{tensor.dtype}\0{tuple(tensor.shape)}\0".encode()
        h.update(header)
        if not content:
            return
        if not tensor.is_complex():
            try:  # a contiguous CPU tensor's own bytes; NumPy refuses bfloat16, float8, GPU, conj views
                h.update(tensor.numpy())
                return
            except (TypeError, RuntimeError, ValueError, BufferError):  # not viewable or not contiguous
                pass
        for piece in checksum.tensor_bytes(tensor):
            h.update(piece)

    def _close_event(self, before: int) -> None:
        """Number the next event, if this one recorded anything."""
        if self._seq > before:
            self.prints.append(EventPrint(self.step, self._stage, self._event, self._print.hexdigest()))
            self._print = self._new_print()
            self._event += 1

    @staticmethod
    def _suffix(index: int) -> str:
        return "" if index == 0 else f"@{index}"

    def _record_init(self) -> None:
        before = self._seq
        for w in self._watched:
            if w.module is None:
                continue
            for name, param in w.module.named_parameters():
                self._add("init", w.prefix + name, param, content=True)
            for name, buf in w.module.named_buffers():
                self._add("init", w.prefix + name, buf, content=True)
        self._close_event(before)

    def _input_hook(self, w: Watched) -> Callable[..., None]:
        def on_input(module: Any, args: tuple[Any, ...], kwargs: dict[str, Any]) -> None:
            call = self._calls.get(id(module), 0)
            before = self._seq
            for name, t in _flatten(f"{w.prefix}input", list(args)):
                self._add("data", name + self._suffix(call), t)
            for name, t in _flatten(f"{w.prefix}input", kwargs):
                self._add("data", name + self._suffix(call), t)
            self._close_event(before)
        return on_input

    def _output_hook(self, w: Watched) -> Callable[..., None]:
        def on_output(module: Any, args: tuple[Any, ...], kwargs: dict[str, Any], output: Any) -> None:
            call = self._calls.get(id(module), 0)
            self._calls[id(module)] = call + 1
            before = self._seq
            for name, t in _flatten(f"{w.prefix}output", output):
                self._add("forward", name + self._suffix(call), t)
            self._close_event(before)
        return on_output

    def _on_loss(self, tensor: Any) -> None:
        before = self._seq
        self._add("forward", "loss" + self._suffix(self._losses), tensor, content=True)
        self._losses += 1
        self._close_event(before)

    def _on_backward(self) -> None:
        before = self._seq
        suffix = self._suffix(self._backwards)
        for param in self._params:
            grad = param.grad
            if grad is not None:
                self._add("backward", f"grad {self._names[id(param)]}{suffix}", grad)
                self._grads_seen[id(param)] = (id(grad), grad._version)
        self._backwards += 1
        self._close_event(before)

    def _before_step(self, optimizer: Any, args: tuple[Any, ...], kwargs: dict[str, Any]) -> None:
        # Gradients changed since the backward that made them (clipped, unscaled, or set by
        # torch.autograd.grad): recorded again, as they go into the step.
        before = self._seq
        for group in optimizer.param_groups:
            for param in group["params"]:
                grad = param.grad
                if grad is not None and self._grads_seen.get(id(param)) != (id(grad), grad._version):
                    self._add("backward", f"grad {self._names.get(id(param), 'unnamed')}@step", grad)
                    self._grads_seen[id(param)] = (id(grad), grad._version)
        self._close_event(before)

    def _after_step(self, optimizer: Any, args: tuple[Any, ...], kwargs: dict[str, Any]) -> None:
        import torch

        before = self._seq
        for group in optimizer.param_groups:
            for param in group["params"]:
                self._add("update", self._names.get(id(param), "unnamed"), param, content=True)
        plan = self._state_plan(optimizer)
        if plan is not None:
            for name, state, key in plan:
                self._add("update", name, state[key])
        else:
            # Parameter names already carry their module's keyword: no second prefix.
            for name, kind, value in self._state_entries(optimizer, "", self._names):
                if kind == "hyperparameter":
                    continue
                if hasattr(value, "detach"):
                    self._add("update", f"state {name}", value)
                else:
                    self._add("update", f"state {name}", torch.as_tensor(np.asarray(value)))
        self._close_event(before)
        self._stepped.add(id(optimizer))
        if self._stepped >= set(self._optimizers):
            self.step += 1
            self._seq = self._event = self._losses = self._backwards = 0
            self._calls.clear()
            self._stepped.clear()

    def _state_plan(self, optimizer: Any) -> list[tuple[str, dict[Any, Any], Any]] | None:
        """Where each state tensor of `optimizer` lives, (name, state dict, key), in the order and with
        the names `state_entries` gives, when every state value is a tensor (Adam, SGD momentum...).

        Rebuilt whenever the optimizer's state changes shape (a new parameter, a key added), so each
        step costs a lookup per tensor instead of a walk through the state; values are fetched anew
        each step, since an optimizer may replace a state tensor rather than update it. None sends
        the step down the general path (L-BFGS's lists, Python numbers)."""
        shape = [len(optimizer.state)]
        states = []
        for group in optimizer.param_groups:
            for param in group["params"]:
                state = optimizer.state.get(param)
                states.append(state)
                shape.append(-1 if state is None else len(state))
        cached = self._plans.get(id(optimizer))
        if cached is not None and cached[0] == shape:
            return cached[1]
        plan: list[tuple[str, dict[Any, Any], Any]] | None = []
        index = 0
        for g, group in enumerate(optimizer.param_groups):
            for p, param in enumerate(group["params"]):
                state = states[index]
                index += 1
                pname = self._names.get(id(param), f"group{g}.param{p}")
                for key in sorted(state or {}, key=str):
                    if not checksum.is_tensor(state[key]):  # type: ignore[index]
                        plan = None
                        break
                    plan.append((f"state {pname}.{key}", state, key))  # type: ignore[arg-type]
                if plan is None:
                    break
            if plan is None:
                break
        self._plans[id(optimizer)] = (shape, plan)
        return plan

    def param_name(self, param: Any) -> str | None:
        """The trace's name of a watched parameter (keyword prefix and `named_parameters()` name)."""
        return self._names.get(id(param))

    def close(self) -> None:
        """Remove every hook and put `torch.Tensor.backward` back. Safe to call twice."""
        import torch

        for handle in self._handles:
            handle.remove()
        self._handles = []
        if Tracer._active is self:
            torch.Tensor.backward = self._original_backward  # type: ignore[method-assign]
            Tracer._active = None
