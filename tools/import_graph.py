#!/usr/bin/env python3
"""The import graph between the files of one Rust module directory.

    python3 tools/import_graph.py src/estimator src/evaluate

For each directory: every `use`/path reference from one file to a sibling
(`super::x`, `crate::<dir>::x`, `self::x` in mod.rs), the circles among them
(strongly connected sets of more than one file), and the arrows back up
(a file below `mod.rs` that names an item of `mod.rs` itself, not of a sibling).
Exits 1 when there is a circle or an arrow back up, so CI can hold the line.
"""

import os
import re
import sys


def strip_comments(text):
    text = re.sub(r"//[^\n]*", "", text)
    return re.sub(r"/\*.*?\*/", "", text, flags=re.S)


def graph(directory):
    crate_path = "crate::" + "::".join(os.path.relpath(directory, "src").split(os.sep))
    files = sorted(f for f in os.listdir(directory) if f.endswith(".rs"))
    modules = {f[:-3] for f in files}
    edges = {}
    for f in files:
        me = f[:-3]
        text = strip_comments(open(os.path.join(directory, f)).read())
        text = re.sub(r"#\[cfg\(test\)\]\s*mod tests\s*\{.*", "", text, flags=re.S)  # unit tests may reach anywhere
        out = set()
        if me == "mod":
            # The entrance names its rooms by plain paths (`basis::ComponentBasis`).
            prefixes = [r"\bself::", re.escape(crate_path) + "::", r"(?<![:\w])(?=(?:" + "|".join(modules) + r")::)"]
        else:
            prefixes = [r"\bsuper::", re.escape(crate_path) + "::"]
        for prefix in prefixes:
            for m in re.finditer(prefix + r"(\{[^}]*\}|[A-Za-z_][A-Za-z0-9_]*)", text):
                names = m.group(1).strip("{}").split(",") if m.group(1).startswith("{") else [m.group(1)]
                for name in names:
                    head = name.strip().split("::")[0].strip()
                    if not head or head == "self":
                        continue
                    out.add(head if head in modules else "mod")
        out.discard(me)
        edges[me] = out
    return edges


def circles(edges):
    index, low, stack, on, out, counter = {}, {}, [], set(), [], [0]

    def visit(v):
        index[v] = low[v] = counter[0]
        counter[0] += 1
        stack.append(v)
        on.add(v)
        for w in edges.get(v, ()):
            if w not in edges:
                continue
            if w not in index:
                visit(w)
                low[v] = min(low[v], low[w])
            elif w in on:
                low[v] = min(low[v], index[w])
        if low[v] == index[v]:
            comp = []
            while True:
                w = stack.pop()
                on.discard(w)
                comp.append(w)
                if w == v:
                    break
            if len(comp) > 1:
                out.append(sorted(comp))

    sys.setrecursionlimit(10000)
    for v in sorted(edges):
        if v not in index:
            visit(v)
    return out


def main():
    bad = False
    for directory in sys.argv[1:] or ["src/estimator", "src/evaluate"]:
        edges = graph(directory)
        pairs = sum(len(v) for v in edges.values())
        print(f"## {directory}: {len(edges)} files, {pairs} arrows")
        for v in sorted(edges):
            print(f"  {v:12} → {', '.join(sorted(edges[v])) or '—'}")
        found = circles(edges)
        up = sorted(v for v in edges if v != "mod" and "mod" in edges[v])
        print(f"  circles: {found or 'none'}")
        print(f"  arrows back up to mod.rs: {up or 'none'}")
        bad |= bool(found or up)
    return 1 if bad else 0


if __name__ == "__main__":
    sys.exit(main())
