"""Signatures -> automaton: byte classes, subset construction, output sets.

A signature is a sequence of byte sets (one byte, or both ASCII cases of a
letter under ``fold_case``).  The automaton's states are sets of *trie
nodes*: the trie is built over byte-set sequences, so signatures share a
node exactly when their byte-set prefixes are equal.  The state reached
after reading input ``w`` is the set of nodes whose prefix matches a suffix
of ``w`` (the root always included).

Construction is breadth first, the way the Aho–Corasick failure links are
built.  For a state ``S`` let ``top(S)`` be its deepest nodes (all of depth
``d``) and ``S'`` the rest.  ``S'`` is itself a reachable state (the one
reached by the last ``d - 1`` bytes), found earlier in the breadth-first
order: it is the *failure state*, and for one plain literal its depth is the
prefix function (border length) of the prefix read so far.  Then

    delta(S, c) = advance(top(S), c)  U  delta(S', c)

so a state's row is its failure state's row with the few classes on which
its deepest nodes advance written over.  A state is keyed by
``(top nodes, failure state)``, which is canonical, so for plain literals the
states are exactly the trie's nodes and the automaton is Aho–Corasick's; when
case-folded and case-sensitive signatures share bytes the same rule merges
nodes into combined states, and stays exact.

The byte classes come from the signatures alone: two bytes are equivalent
when every byte set of every signature holds both or neither of them.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

if TYPE_CHECKING:  # numpy is imported where it is used: table loading does not need it
    import numpy as np

from collections.abc import Sequence
from dataclasses import dataclass

DEFAULT_MAX_STATES = 2_000_000


class CompileError(ValueError):
    """The signature set cannot be compiled (for example: too many states)."""


@dataclass(slots=True)
class Automaton:
    """A complete DFA over byte classes, states renumbered for scanning.

    ``trans[s, c]`` is the next state.  States ``0 .. first_match - 1`` have
    no outputs; ``first_match .. states - 1`` each have a non-empty output
    list ``outputs[s - first_match]`` (signature indices, ascending).  State 0
    is the start state.  ``fail`` and ``depth`` describe the construction:
    ``fail[s]`` is the state reached by the last ``depth[s] - 1`` bytes.
    """

    classes: bytes  # 256 entries: byte -> class
    nclasses: int
    trans: np.ndarray  # (states, nclasses) uint32
    first_match: int
    outputs: list[tuple[int, ...]]
    fail: np.ndarray  # (states,) uint32
    depth: np.ndarray  # (states,) uint32
    max_len: int
    unique_nodes: list[int]  # per pattern: trie nodes no other pattern uses (states its removal saves, for plain literals)

    @property
    def states(self) -> int:
        return int(self.trans.shape[0])

    def step(self, state: int, byte: int) -> int:
        return int(self.trans[state, self.classes[byte]])


def byte_classes(patterns: Sequence[Sequence[frozenset[int]]]) -> tuple[bytes, int]:
    """Alphabet compression: the coarsest partition of 0..255 that every byte
    set of every pattern respects.  Class ids are given in order of each
    class's smallest byte, so byte 0 is always in class 0."""
    member: list[list[int]] = [[] for _ in range(256)]
    seen: dict[frozenset[int], int] = {}
    for pattern in patterns:
        for byte_set in pattern:
            if byte_set not in seen:
                k = seen[byte_set] = len(seen)
                for b in byte_set:
                    member[b].append(k)
    ids: dict[tuple[int, ...], int] = {}
    classes = bytearray(256)
    for b in range(256):
        classes[b] = ids.setdefault(tuple(member[b]), len(ids))
    return bytes(classes), len(ids)


def build(patterns: Sequence[Sequence[frozenset[int]]], *, max_states: int = DEFAULT_MAX_STATES,
          names: Sequence[str] | None = None) -> Automaton:
    """Compile patterns (each a non-empty sequence of byte sets) into an
    :class:`Automaton`; output lists hold indices into ``patterns``."""
    import numpy as np

    if not patterns:
        raise CompileError("no signatures to compile")
    classes, ncls = byte_classes(patterns)

    # Trie over class-set sequences.  Per node: edges by class (a child whose
    # label holds several classes is listed under each), terminal patterns.
    edges: list[dict[int, list[int]]] = [{}]
    labels: list[dict[frozenset[int], int]] = [{}]
    terminal: list[tuple[int, ...]] = [()]
    owner: list[int] = [-1]
    users: list[int] = [0]
    paths: list[list[int]] = []
    for index, pattern in enumerate(patterns):
        if not pattern:
            raise CompileError(f"signature #{index + 1} is empty")
        node = 0
        path = []
        for byte_set in pattern:
            label = frozenset(classes[b] for b in byte_set)
            child = labels[node].get(label)
            if child is None:
                child = len(edges)
                edges.append({})
                labels.append({})
                terminal.append(())
                owner.append(index)
                users.append(0)
                labels[node][label] = child
                for c in label:
                    edges[node].setdefault(c, []).append(child)
            node = child
            if not path or path[-1] != node:
                users[node] += 1
            path.append(node)
        paths.append(path)
        terminal[node] += (index,)
    unique = [sum(1 for node in path if users[node] == 1) for path in paths]

    # Breadth-first subset construction; see the module docstring.
    capacity = max(1024, len(edges) + 16)
    trans = np.zeros((capacity, ncls), dtype=np.uint32)
    tops: list[tuple[int, ...]] = [(0,)]
    fail: list[int] = [0]
    depth: list[int] = [0]
    out: list[tuple[int, ...]] = [()]
    key_to_state: dict[tuple[tuple[int, ...], int], int] = {}
    level = [0]
    while level:
        next_level: list[int] = []
        if level != [0]:
            rows = np.fromiter(level, dtype=np.int64, count=len(level))
            trans[rows] = trans[np.fromiter((fail[s] for s in level), dtype=np.int64, count=len(level))]
        set_rows: list[int] = []
        set_cols: list[int] = []
        set_vals: list[int] = []
        for s in level:
            top = tops[s]
            if len(top) == 1:
                advances = edges[top[0]]
            else:
                advances = {}
                for node in top:
                    for c, children in edges[node].items():
                        advances.setdefault(c, []).extend(children)
            if not advances:
                continue
            f = fail[s]
            row_f = trans[f] if s else None
            for c, children in advances.items():
                target = tuple(sorted(set(children))) if len(children) > 1 else tuple(children)
                rest = int(row_f[c]) if s else 0
                key = (target, rest)
                t = key_to_state.get(key)
                if t is None:
                    t = len(tops)
                    if t >= max_states:
                        raise _too_many_states(max_states, tops, owner, patterns, names)
                    key_to_state[key] = t
                    tops.append(target)
                    fail.append(rest)
                    depth.append(depth[s] + 1)
                    own = ()
                    for node in target:
                        own += terminal[node]
                    out.append(tuple(sorted(set(own + out[rest]))) if own else out[rest])
                    next_level.append(t)
                    if t >= capacity:
                        capacity *= 2
                        grown = np.zeros((capacity, ncls), dtype=np.uint32)
                        grown[: trans.shape[0]] = trans
                        trans = grown
                set_rows.append(s)
                set_cols.append(c)
                set_vals.append(t)
        if set_rows:
            trans[set_rows, set_cols] = set_vals
        level = next_level
    nstates = len(tops)
    trans = trans[:nstates]

    # Renumber: states without outputs first (breadth-first order kept, so the
    # start state stays 0), then the match states.
    has_out = np.fromiter((1 if o else 0 for o in out), dtype=np.uint8, count=nstates)
    order = np.concatenate([np.flatnonzero(has_out == 0), np.flatnonzero(has_out)])
    new_id = np.empty(nstates, dtype=np.uint32)
    new_id[order] = np.arange(nstates, dtype=np.uint32)
    first_match = int(nstates - has_out.sum())
    trans = new_id[trans[order]]
    fail_arr = new_id[np.asarray(fail, dtype=np.int64)[order]]
    depth_arr = np.asarray(depth, dtype=np.uint32)[order]
    outputs = [out[i] for i in order[first_match:].tolist()]
    return Automaton(classes=classes, nclasses=ncls, trans=trans, first_match=first_match,
                     outputs=outputs, fail=fail_arr, depth=depth_arr,
                     max_len=max(len(p) for p in patterns), unique_nodes=unique)


def _too_many_states(max_states, tops, owner, patterns, names) -> CompileError:
    """Name the signatures that own the deepest nodes of the most states."""
    cost: dict[int, int] = {}
    for top in tops:
        for node in top:
            if node:
                cost[owner[node]] = cost.get(owner[node], 0) + 1
    worst = sorted(cost.items(), key=lambda kv: -kv[1])[:5]
    label = (lambda i: repr(names[i])) if names else (lambda i: f"#{i + 1}")
    listing = ", ".join(f"{label(i)} ({n} states)" for i, n in worst)
    return CompileError(
        f"the automaton needs more than {max_states:,} states; the signatures contributing "
        f"the most are: {listing}. Drop or shorten some of them, or raise the state cap.")
