"""``pellucid demo``: rebuild the demo models or write demo tile folders (invented data only)."""

from __future__ import annotations

import argparse
from pathlib import Path

from pellucid.commands._progress import ProgressBar


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("demo", help="rebuild the demo tile models or write demo tile folders",
                       description="The demo scenario: glazed wall tiles from an invented inspection line, "
                                   "with a planted shortcut (an orange calibration tag). Everything is generated "
                                   "deterministically from seeds.")
    demo_sub = p.add_subparsers(dest="demo_command", metavar="ACTION", parser_class=type(p))
    build = demo_sub.add_parser("build", help="retrain a demo model deterministically (about a minute on the CPU)")
    build.add_argument("--variant", choices=("tainted", "untainted"), default="tainted",
                       help="tainted learns the tag shortcut (the bundled 'tilenet'); untainted does not")
    build.add_argument("--out", type=Path, default=None, metavar="DIR",
                       help="folder to write (default: demo_models/tilenet or demo_models/tilenet-clean)")
    build.add_argument("--seed", type=int, default=0, help="seed for data and training (default 0)")
    build.set_defaults(func=_build)
    tiles = demo_sub.add_parser("tiles", help="write a split of demo tiles as one folder per class + manifest.csv")
    tiles.add_argument("--split", choices=("train", "clean", "untainted"), default="clean",
                       help="train: tag mostly on cracks; clean: tag independent of class (default); "
                            "untainted: no tag correlation")
    tiles.add_argument("--per-class", type=int, default=25, help="tiles per class (default 25)")
    tiles.add_argument("--seed", type=int, default=0, help="seed (default 0)")
    tiles.add_argument("--out", type=Path, required=True, metavar="DIR", help="folder to write")
    tiles.set_defaults(func=_tiles)
    p.set_defaults(func=lambda _args: (p.print_help(), 2)[1])


def _build(args: argparse.Namespace) -> int:
    from pellucid.core.model.bundled import demo_models_dir
    from pellucid.demo.train import build_demo_model

    out = args.out or demo_models_dir() / ("tilenet" if args.variant == "tainted" else "tilenet-clean")
    build = build_demo_model(out, variant=args.variant, seed=args.seed, progress=ProgressBar("training"))
    clean = build.metrics["clean"]
    print(f"wrote {build.out_dir} in {build.seconds:.0f} s: clean-split accuracy {clean['accuracy']:.1%}, "
          f"tagged sound tiles called crack {clean['tagged_sound_called_crack']:.1%}")
    return 0


def _tiles(args: argparse.Namespace) -> int:
    from pellucid.demo.tiles import make_split, write_folder

    manifest = write_folder(make_split(args.split, per_class=args.per_class, seed=args.seed), args.out)
    print(f"wrote {args.per_class * 4} tiles of split {args.split!r} to {args.out} (manifest: {manifest})")
    return 0
