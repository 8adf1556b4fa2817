"""``pellucid models``: list the bundled models and show a spec."""

from __future__ import annotations

import argparse
import json


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("models", help="list bundled models, or load one and show its spec and fingerprint",
                       description="List the bundled models. With NAME (or a spec path), load it and print its "
                                   "spec, fingerprint and notes as JSON.")
    p.add_argument("name", nargs="?", help="bundled model name or spec file to load and describe")
    p.add_argument("--trust-pickled", action="store_true", help="allow specs of kind 'pickled'")
    p.set_defaults(func=_models)


def _models(args: argparse.Namespace) -> int:
    from pellucid.core.errors import PellucidError
    from pellucid.core.model.bundled import bundled_specs, resolve_model_ref
    from pellucid.core.model.spec import ModelSpec

    if args.name:
        from pellucid.core.model.loading import load_model  # torch: only when a model is loaded

        model = load_model(resolve_model_ref(args.name), trust_pickled=args.trust_pickled)
        print(json.dumps(model.summary(), indent=2))
        return 0
    rows = []
    for folder, path in bundled_specs().items():
        try:
            spec = ModelSpec.from_toml(path)
            rows.append((folder, spec.source.kind, f"{spec.input.channels}×{spec.input.height}×{spec.input.width}",
                         spec.description))
        except PellucidError as exc:
            rows.append((folder, "?", "?", f"unreadable spec: {exc}"))
    width = max((len(r[0]) for r in rows), default=4)
    print(f"{'NAME'.ljust(width)}  {'SOURCE':<11}  {'INPUT':<11}  DESCRIPTION")
    for name, kind, shape, desc in rows:
        print(f"{name.ljust(width)}  {kind:<11}  {shape:<11}  {desc}")
    return 0
