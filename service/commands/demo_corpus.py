"""``burstlens demo-corpus --out DIR``: regenerate the invented demo site, bit for bit."""
from __future__ import annotations

import hashlib
import sys

from burstlens.search import demo_site


def register(p) -> None:
    p.description = ("Generate the invented Quillmoor Deep geophone array record from physics "
                     "(Brune sources, attenuation, coda, guided waves, site noise): one miniSEED "
                     "file per station plus catalogue.json. The same seed gives identical bytes.")
    p.add_argument("--out", required=True, metavar="DIR", help="folder to write into (created if missing)")
    p.add_argument("--seed", type=int, default=None, help="generator seed (default: the committed demo's)")
    p.set_defaults(func=run)


def run(args) -> int:
    seed = demo_site.DEFAULT_SEED if args.seed is None else args.seed
    try:
        paths = demo_site.write_demo_corpus(args.out, seed=seed)
    except OSError as exc:
        print(f"burstlens demo-corpus: {args.out}: cannot write ({exc.strerror or exc})", file=sys.stderr)
        return 2
    for path in paths:
        with open(path, "rb") as fh:
            digest = hashlib.sha256(fh.read()).hexdigest()
        print(f"{digest}  {path}")
    return 0
