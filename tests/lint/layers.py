#!/usr/bin/python3
"""Check the rule between the source folders (docs/architecture.md).

Each layer may include headers of its own folder and of the layers listed
for it below; nothing includes a header of server/, cli/ or sim/ from
outside. The build enforces the same rule through per-folder include paths
(Makefile, INC_*); this script names the broken rule in words, file and line.
Exit 0 when every #include "..." keeps the rule, 1 otherwise."""
import pathlib
import re
import sys

ROOT = pathlib.Path(__file__).resolve().parents[2]

# layer -> folder
FOLDERS = {
    "lib": "daemon/lib", "chem": "daemon/chem", "core": "daemon/core",
    "store": "daemon/store", "server": "daemon/server", "cli": "daemon/cli",
    "sim": "daemon/sim", "drivers": "drivers",
}
# layer -> the other layers it may use
ALLOWED = {
    "lib": set(),
    "drivers": {"lib"},
    "chem": {"lib"},
    "store": {"lib"},
    "core": {"lib", "chem"},
    "cli": {"lib", "chem", "core", "drivers"},
    "sim": {"lib", "chem", "drivers"},
    "server": {"lib", "chem", "core", "store", "drivers"},
}
INCLUDE = re.compile(r'^\s*#\s*include\s+"([^"]+)"', re.M)


def main():
    global ROOT
    if len(sys.argv) == 3 and sys.argv[1] == "--root":   # for the checker's own test
        ROOT = pathlib.Path(sys.argv[2])
    where = {}   # header name -> layer
    for layer, folder in FOLDERS.items():
        for h in (ROOT / folder).glob("*.h"):
            if h.name in where:
                print(f"{h.relative_to(ROOT)}: header name also in {where[h.name]}/; "
                      "names must be unique across layers")
                return 1
            where[h.name] = layer
    bad = 0
    loose = sorted(p.name for p in (ROOT / "daemon").glob("*.[ch]"))
    if loose:
        print(f"daemon/: files outside every layer: {', '.join(loose)}")
        bad += 1
    for layer, folder in FOLDERS.items():
        for src in sorted((ROOT / folder).glob("*.[ch]")):
            text = src.read_text(encoding="utf-8")
            for m in INCLUDE.finditer(text):
                name = m.group(1)
                line = text.count("\n", 0, m.start()) + 1
                other = where.get(name)
                rel = src.relative_to(ROOT)
                if other is None:
                    print(f"{rel}:{line}: includes \"{name}\", which no layer has")
                    bad += 1
                elif other != layer and other not in ALLOWED[layer]:
                    may = ", ".join(sorted(ALLOWED[layer])) or "nothing of ours"
                    print(f"{rel}:{line}: {layer}/ may not include {other}/{name} "
                          f"({layer} may use: {may})")
                    bad += 1
    if bad:
        print(f"layers: {bad} broken rule(s); see docs/architecture.md")
        return 1
    print(f"layers: {sum(1 for f in FOLDERS.values() for _ in (ROOT / f).glob('*.[ch]'))} "
          "files keep the rule")
    return 0


if __name__ == "__main__":
    sys.exit(main())
