"""Per-step trace: checksums of every stage of every optimizer step.

"The loss differs at step 37" does not say whether the data, the model, autograd or the
optimizer changed. A trace records, for each optimizer step, the model inputs (stage
`data`), the model outputs and the loss (stage `forward`), every gradient (stage
`backward`) and every parameter and optimizer-state entry after the update (stage
`update`). Comparing two traces in that order finds the first step and stage where two
runs part, which names the culprit.

Hooks used: a forward pre-hook and a forward hook on the watched module, an optimizer
step pre-hook and post-hook, and a wrapper around `torch.Tensor.backward` (to see the
loss; removed after the test). For closure-based optimizers (L-BFGS) the step pre-hook
wraps the closure, so each forward/backward evaluation inside one step is recorded in
call order.
"""

from __future__ import annotations

from typing import Any, Callable, Iterator

import numpy as np

from . import checksum
from .errors import UsageError
from .records import TraceEntry
from .text import nested_items


def _flatten(prefix: str, value: Any) -> Iterator[tuple[str, Any]]:
    return nested_items(prefix, value, checksum.is_tensor)


class Tracer:
    """Hooks a module and an optimizer and records one `TraceEntry` per tensor per stage."""

    _active: Tracer | None = None

    def __init__(self, model: Any, optimizer: Any, state_entries: Callable[[Any], Iterator[tuple[str, str, Any]]],
                 param_names: Callable[[Any], str]) -> None:
        import torch

        if Tracer._active is not None:
            raise UsageError("trajectory.watch: a trace is already running in this process; watch once per test")
        self.entries: list[TraceEntry] = []
        self.step = 0
        self._seq = 0
        self._calls = 0
        self._losses = 0
        self._evals = 0
        self._model = model
        self._optimizer = optimizer
        self._state_entries = state_entries
        self._param_names = param_names
        self._handles = [
            model.register_forward_pre_hook(self._on_input, with_kwargs=True),
            model.register_forward_hook(self._on_output, with_kwargs=True),
            optimizer.register_step_pre_hook(self._before_step),
            optimizer.register_step_post_hook(self._after_step),
        ]
        self._original_backward = torch.Tensor.backward
        tracer = self
        original = self._original_backward

        def backward(tensor: Any, *args: Any, **kwargs: Any) -> Any:
            tracer._on_loss(tensor)
            return original(tensor, *args, **kwargs)

        backward.__doc__ = original.__doc__
        torch.Tensor.backward = backward  # type: ignore[method-assign]
        Tracer._active = self

    # -- recording -------------------------------------------------------------------
    def _add(self, stage: str, call: int, name: str, tensor: Any) -> None:
        tensor = tensor.detach()
        digest, st, sketch = checksum.describe(tensor, checksum.TRACE_SKETCH)
        self.entries.append(TraceEntry(
            self.step, stage, self._seq, call, name + self._suffix(call), str(tensor.dtype).replace("torch.", ""),
            tuple(int(d) for d in tensor.shape), digest,
            st.min, st.max, st.mean, st.l2, st.nonfinite, sketch,
        ))
        self._seq += 1

    def _suffix(self, index: int) -> str:
        return "" if index == 0 else f"@{index}"

    def _on_input(self, module: Any, args: tuple[Any, ...], kwargs: dict[str, Any]) -> None:
        for name, t in _flatten("input", list(args)):
            self._add("data", self._calls, name, t)
        for name, t in _flatten("input", kwargs):
            self._add("data", self._calls, name, t)

    def _on_output(self, module: Any, args: tuple[Any, ...], kwargs: dict[str, Any], output: Any) -> None:
        for name, t in _flatten("output", output):
            self._add("forward", self._calls, name, t)
        self._calls += 1

    def _on_loss(self, tensor: Any) -> None:
        self._add("forward", self._losses, "loss", tensor)
        self._losses += 1

    def _record_grads(self) -> None:
        for group in self._optimizer.param_groups:
            for param in group["params"]:
                if param.grad is not None:
                    self._add("backward", self._evals, f"grad {self._param_names(param)}", param.grad)
        self._evals += 1

    def _before_step(self, optimizer: Any, args: tuple[Any, ...], kwargs: dict[str, Any]) -> Any:
        # torch passes the bound call's positional arguments, the optimizer itself first.
        closure = kwargs.get("closure", args[1] if len(args) > 1 else None)
        if closure is None:
            self._record_grads()
            return None
        tracer = self

        def traced_closure() -> Any:
            result = closure()
            tracer._record_grads()
            return result

        if "closure" in kwargs:
            return args, {**kwargs, "closure": traced_closure}
        return (args[0], traced_closure, *args[2:]), kwargs

    def _after_step(self, optimizer: Any, args: tuple[Any, ...], kwargs: dict[str, Any]) -> None:
        for group in optimizer.param_groups:
            for param in group["params"]:
                self._add("update", 0, self._param_names(param), param)
        for name, kind, value in self._state_entries(optimizer):
            if kind == "hyperparameter":
                continue
            if hasattr(value, "detach"):
                self._add("update", 0, f"state {name}", value)
            else:
                import torch

                self._add("update", 0, f"state {name}", torch.as_tensor(np.asarray(value)))
        self.step += 1
        self._seq = 0
        self._calls = self._losses = self._evals = 0

    def close(self) -> None:
        """Remove every hook and put `torch.Tensor.backward` back. Safe to call twice."""
        import torch

        for handle in self._handles:
            handle.remove()
        self._handles = []
        if Tracer._active is self:
            torch.Tensor.backward = self._original_backward  # type: ignore[method-assign]
            Tracer._active = None
