"""A torch optimizer's saved state, moved onto our parameter groups by parameter name.

Why: `optimizer.state_dict()` keys its per-parameter state by position, 0, 1, 2,
... counted through `param_groups` in order, and names nothing. Our optimizer
(optim/groups.py) splits the same parameters into its own groups, in its own
order, so positions must become names before they can become our positions.

The assumption (documented for users in docs and `scaledrill adopt`'s error): the
original script built its groups from `model.named_parameters()`, each group
listing its parameters in that order, possibly split across groups (a single
`model.parameters()` group, or decay / no-decay groups made by a filter over
`named_parameters()`, as nearly every script does). Then each group is a
subsequence of the named order, and the split is found from the saved shapes:
each parameter in turn goes to a group whose next saved tensor has its shape.
When more than one split fits the shapes (an entry without state fits any shape),
the first one found is used only if every split gives each name the same state;
otherwise the file is refused as ambiguous.

State kinds, by the keys of a parameter's entry:
- sgd: `momentum_buffer` (torch.optim.SGD);
- adamw: `exp_avg`, `exp_avg_sq`, `step` (torch.optim.Adam and AdamW, our LAMB too,
  which the configured optim.name tells apart);
- lars: `momentum` (our LARS).
"""

import torch

KINDS = {"sgd": ("momentum_buffer",), "adamw": ("exp_avg", "exp_avg_sq"), "lamb": ("exp_avg", "exp_avg_sq"), "lars": ("momentum",)}
HYPER = {"sgd": ("momentum", "nesterov"), "lars": ("momentum",), "adamw": ("betas", "eps"), "lamb": ("betas", "eps")}


def _shape(entry: dict) -> tuple | None:
    for value in entry.values():
        if isinstance(value, torch.Tensor) and value.ndim > 0:
            return tuple(value.shape)
    return None  # no tensor state (yet): fits any parameter


def split_by_shape(named: list[tuple[str, tuple]], groups: list[list[int]], state: dict, limit: int = 64,
                   budget: int = 200_000) -> list[dict]:
    """Every assignment position -> name (up to `limit`) that keeps each group in named order and fits the shapes.
    A search past `budget` placements returns what it found plus a None marker: treated as ambiguous."""
    shapes = {i: _shape(state.get(i, {})) for g in groups for i in g}
    found: list = []
    visits = [0]

    def place(k: int, heads: list[int], assigned: dict):
        visits[0] += 1
        if len(found) >= limit or visits[0] > budget:
            return
        if k == len(named):
            if all(h == len(g) for h, g in zip(heads, groups)):
                found.append(dict(assigned))
            return
        name, shape = named[k]
        for gi, group in enumerate(groups):
            if heads[gi] < len(group):
                index = group[heads[gi]]
                if shapes[index] is None or shapes[index] == shape:
                    heads[gi] += 1
                    assigned[index] = name
                    place(k + 1, heads, assigned)
                    del assigned[index]
                    heads[gi] -= 1

    place(0, [0] * len(groups), {})
    if visits[0] > budget and found:
        found.append(None)  # not searched to the end: more splits may exist
    return found


def _same_entry(a: dict, b: dict) -> bool:
    if set(a) != set(b):
        return False
    for key in a:
        x, y = a[key], b[key]
        if isinstance(x, torch.Tensor) or isinstance(y, torch.Tensor):
            if not (isinstance(x, torch.Tensor) and isinstance(y, torch.Tensor) and x.shape == y.shape and torch.equal(x, y)):
                return False
        elif x != y:
            return False
    return True


def adopt_optimizer(saved: dict, optimizer: torch.optim.Optimizer, model: torch.nn.Module, kind: str, where: str) -> tuple[dict, list[str]]:
    """(our optimizer's state_dict holding the saved state, mismatch lines). `kind` is optim.name."""
    problems: list[str] = []
    if not isinstance(saved, dict) or "state" not in saved or "param_groups" not in saved:
        return {}, [f"{where}: not a torch optimizer state_dict (needs 'state' and 'param_groups')"]
    groups = [list(g.get("params", [])) for g in saved["param_groups"]]
    state = {int(k): v for k, v in saved["state"].items()}
    named = [(n, tuple(p.shape)) for n, p in model.named_parameters() if p.requires_grad]
    count = sum(len(g) for g in groups)
    if count != len(named):
        return {}, [f"{where}: holds {count} parameters in {len(groups)} group(s), the model (task.model) has {len(named)} trainable ones"]
    problems += _kind_problems(state, kind, where)
    splits = split_by_shape(named, groups, state)
    if not splits:
        lines = [f"{where}: no split of the model's parameters into the saved groups fits the saved shapes "
                 "(the groups must list parameters in model.named_parameters() order)"]
        by_position = [name for name, _ in named]
        for i in sorted(state):
            shape = _shape(state[i])
            want = dict(named).get(by_position[i]) if i < len(by_position) else None
            if shape is not None and want is not None and shape != want:
                lines.append(f"{where}: entry {i} has shape {list(shape)}, parameter {by_position[i]} {list(want)}")
        return {}, problems + lines
    chosen = splits[0]
    first = {name: state.get(i, {}) for i, name in chosen.items()}
    for other in splits[1:]:
        if other is None or not all(_same_entry(first[name], state.get(i, {})) for i, name in other.items()):
            return {}, problems + [f"{where}: the saved shapes fit several splits of the parameters into its {len(groups)} groups, "
                                   "which give different state; save the optimizer with one group, or adopt without it"]
    settings = {}
    for g, group in zip(groups, saved["param_groups"]):
        for i in g:
            settings[chosen[i]] = group
    mine = optimizer.state_dict()
    position = {}
    for group, ours in zip(mine["param_groups"], optimizer.param_groups):
        for index, name in zip(group["params"], ours["param_names"]):
            position[name] = index
            problems += _hyper_problems(name, settings[name], ours, kind, where)
    mine["state"] = {position[name]: state[i] for i, name in chosen.items() if state.get(i)}
    return mine, problems


def _kind_problems(state: dict, kind: str, where: str) -> list[str]:
    keys = set().union(*[set(v) for v in state.values()]) if state else set()
    if not keys:
        return []
    saved_kind = next((k for k, needs in KINDS.items() if set(needs) <= keys), None)
    if saved_kind is None or not set(KINDS[kind]) <= keys:
        shown = saved_kind or "unknown (state keys " + ", ".join(sorted(keys)) + ")"
        return [f"{where}: optimizer type {shown} in the file, optim.name={kind} here"]
    return []


def _hyper_problems(name: str, theirs: dict, ours: dict, kind: str, where: str) -> list[str]:
    """Settings that change what a step does (not lr: the schedule sets it every step)."""
    out = []
    for key in ("weight_decay", *HYPER[kind]):
        a, b = theirs.get(key), ours.get(key)
        if a is None or b is None:
            continue
        a, b = (tuple(a), tuple(b)) if isinstance(a, (list, tuple)) else (a, b)
        if a != b:
            out.append(f"{where}: parameter {name}: {key} is {a} in the file, {b} here (optim.{key if key != 'weight_decay' else 'weight_decay / optim.exclude'})")
    return out
