"""``pellucid audit``: audit a labelled image folder and, with a policy, gate on it.

Exit status: 0 when every threshold of the policy holds (or no policy was given), 1 when one
fails (each failure is printed), 2 for bad input. A JSON summary goes to ``--out``.
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import TYPE_CHECKING, Any

from pellucid.commands._progress import ProgressBar

if TYPE_CHECKING:
    import numpy as np

EXIT_OK, EXIT_GATE_FAILED = 0, 1


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "audit",
        help="audit a labelled image folder for shortcut evidence; gate on a policy",
        description=(
            "Explain every image of a labelled folder (class subfolders or a CSV manifest) with an attribution "
            "method, measure where the evidence sits (object, corners, border, centre), cluster each class's "
            "maps and test the most suspicious clusters by removal and transplant (discovery and confirmation, "
            "on by default), run the optional injection and background-swap tests, store the run, and check it "
            "against a policy. Exits 0 when every threshold holds, 1 when one fails."
        ),
    )
    p.add_argument("--model", required=True, metavar="SPEC", help="model spec file or bundled model name")
    p.add_argument("--images", type=Path, default=None, metavar="DIR",
                   help="the images to audit: a folder with one subfolder per class, or a CSV manifest "
                        "(path,label[,box…,mask]) (required)")
    p.add_argument("--data", type=Path, default=None, dest="old_images", help=argparse.SUPPRESS)
    p.add_argument("--policy", type=Path, default=None, metavar="POLICY.toml",
                   help="thresholds to gate on (see the README's policy keys); without it the audit only reports")
    p.add_argument("--out", type=Path, required=True, metavar="DIR", help="folder for summary.json (and the report)")
    p.add_argument("--method", default=None, help="attribution method (default: the policy's [audit] method, "
                   "else gradcam, or occlusion for models without forward hooks such as TorchScript); "
                   "'pellucid inspect --list-methods' lists them")
    p.add_argument("--param", action="append", default=[], metavar="KEY=VALUE",
                   help="a parameter of the method, e.g. stride=16 for occlusion (repeatable)")
    p.add_argument("--target", choices=("label", "predicted"), default=None,
                   help="explain each image's true label (default) or the predicted class")
    p.add_argument("--engine", choices=("local", "ray"), default="local",
                   help="local process pool (default) or Ray tasks")
    p.add_argument("--workers", type=int, default=1, metavar="N",
                   help="parallel workers (local: processes; ray: CPUs for a new local runtime). Default 1")
    p.add_argument("--ray-address", default=None, metavar="ADDR",
                   help="Ray cluster to join (default: $RAY_ADDRESS, else a local Ray runtime)")
    p.add_argument("--store", type=Path, default=None, metavar="DIR",
                   help="data folder for stored runs (default: $PELLUCID_DATA or ./.pellucid)")
    p.add_argument("--fresh", action="store_true",
                   help="start a new run even if an interrupted run with the same inputs could be resumed")
    p.add_argument("--inject-patch", type=Path, default=None, metavar="PNG",
                   help="suspect patch picture for the injection test")
    p.add_argument("--inject-from", type=Path, default=None, metavar="IMAGE",
                   help="cut the suspect patch from this image (as the model sees it) using --inject-box")
    p.add_argument("--inject-box", default=None, metavar="X0,Y0,X1,Y1", help="box of the patch in --inject-from")
    p.add_argument("--inject-at", default=None, metavar="X,Y",
                   help="where to paste the patch (model-input pixels; default: the box's own place), or "
                        "'random' for a seeded random place in each image")
    p.add_argument("--inject-class", default=None, metavar="CLASS", help="the class the patch is suspected to cue")
    p.add_argument("--inject-limit", type=int, default=None, metavar="N", help="test at most N images")
    p.add_argument("--inject-seed", type=int, default=0, metavar="N",
                   help="with --inject-at random: the seed the places are drawn from (default 0)")
    p.add_argument("--no-discovery", dest="discovery", action="store_false",
                   help="skip discovery (clusters of each class's maps) and confirmation; both run by default")
    p.add_argument("--no-confirmation", dest="confirmation", action="store_false",
                   help="keep discovery but skip confirmation (removal and transplant of suspicious clusters)")
    p.add_argument("--channel-layer", default=None, metavar="NAME",
                   help="rank the channels of this layer for suspicious clusters (default: Grad-CAM's layer, the "
                        "feature map that feeds the head)")
    p.add_argument("--background-swap", action="store_true",
                   help="also replace each object's background (needs masks or boxes) and report the accuracy change")
    p.add_argument("--gallery-layer", default=None, metavar="NAME",
                   help="also build the channel response gallery of this layer")
    p.add_argument("--gallery-top", type=int, default=8, metavar="N", help="top patches per channel (default 8)")
    p.add_argument("--shard-size", type=int, default=8, metavar="N", help="images per shard (default 8)")
    p.add_argument("--threads", type=int, default=1, metavar="N",
                   help="torch threads per worker (default 1; results depend on it in the last bits)")
    p.add_argument("--report", action="store_true", help="also write report.html and report.pdf into --out")
    p.add_argument("--trust-pickled", action="store_true", help="allow model specs of kind 'pickled'")
    p.add_argument("-q", "--quiet", action="store_true",
                   help="no progress output (a bar on a terminal, else a line every few seconds)")
    p.set_defaults(func=_audit)


def _pair(text: str, what: str, n: int) -> tuple[int, ...]:
    from pellucid.core.errors import BadParameterError

    parts = text.replace(" ", "").split(",")
    try:
        values = tuple(int(v) for v in parts)
    except ValueError:
        values = ()
    if len(values) != n:
        example = "X,Y" if n == 2 else "X0,Y0,X1,Y1"
        raise BadParameterError(f"{what} must be {n} whole numbers like {example}; received {text!r}")
    return values


def _params(items: list[str]) -> dict[str, str]:
    from pellucid.core.errors import BadParameterError

    out: dict[str, str] = {}
    for item in items:
        key, sep, value = item.partition("=")
        if not sep or not key.strip():
            raise BadParameterError(f"--param must look like KEY=VALUE (e.g. stride=16); received {item!r}")
        out[key.strip()] = value.strip()
    return out


def _read_patch(path: Path) -> np.ndarray:
    import numpy as np

    from pellucid.core.model.preprocess import read_image

    return np.asarray(read_image(path).pil.convert("RGB"), dtype=np.uint8).copy()


def build_injection(args: argparse.Namespace, model: Any, policy: Any) -> Any | None:
    from pellucid.core.audit import InjectionSpec, crop_patch
    from pellucid.core.errors import BadParameterError

    given = any(v is not None for v in (args.inject_patch, args.inject_from, args.inject_class))
    if given:
        if args.inject_class is None:
            raise BadParameterError("the injection test needs --inject-class (the class the patch may cue)")
        if args.inject_patch is not None and args.inject_from is not None:
            raise BadParameterError("give either --inject-patch or --inject-from with --inject-box, not both")
        at = ("random" if args.inject_at == "random" else _pair(args.inject_at, "--inject-at", 2)) \
            if args.inject_at else None
        if args.inject_from is not None:
            if not args.inject_box:
                raise BadParameterError("--inject-from needs --inject-box X0,Y0,X1,Y1")
            box = _pair(args.inject_box, "--inject-box", 4)
            patch = crop_patch(model, args.inject_from, box)  # type: ignore[arg-type]
            source = f"cut from {args.inject_from.resolve()} box {list(box)}"
            at = at or (box[0], box[1])
        elif args.inject_patch is not None:
            if at is None:
                raise BadParameterError("--inject-patch needs --inject-at X,Y (where to paste it)")
            patch = _read_patch(args.inject_patch)
            source = f"file {args.inject_patch.resolve()}"
        else:
            raise BadParameterError("--inject-class needs a patch: --inject-patch PNG or --inject-from IMAGE")
        seed = getattr(args, "inject_seed", 0) or 0
        if seed and at != "random":
            raise BadParameterError("--inject-seed only applies with --inject-at random")
        return InjectionSpec(patch=patch, suspect_class=args.inject_class,
                             at=at if at == "random" else (int(at[0]), int(at[1])),
                             source=source, limit=args.inject_limit, seed=seed)
    if policy is not None and policy.injection is not None:
        inj = policy.injection
        if not inj.patch.is_file():
            raise BadParameterError(f"the policy's injection patch {str(inj.patch)!r} does not exist")
        return InjectionSpec(patch=_read_patch(inj.patch), suspect_class=inj.suspect_class, at=inj.at,
                             source=f"policy patch {inj.patch.name}", limit=inj.limit, seed=inj.seed)
    return None


def _command(args: argparse.Namespace) -> str:
    """The command that re-runs this audit, with absolute paths (built by ``core/audit/command.py``)."""
    from pellucid.core.audit.command import audit_command

    def absolute(path: Path | None) -> str | None:
        return str(path.resolve()) if path is not None else None

    return audit_command(
        model=str(Path(args.model).resolve()) if Path(args.model).exists() else args.model,
        images=str(args.images.resolve()), out=str(args.out.resolve()), policy=absolute(args.policy),
        method=args.method, params=args.param, target=args.target, store=absolute(args.store),
        inject_patch=absolute(args.inject_patch), inject_from=absolute(args.inject_from),
        inject_box=args.inject_box, inject_at=args.inject_at, inject_class=args.inject_class,
        inject_limit=args.inject_limit, inject_seed=getattr(args, "inject_seed", 0) or 0,
        gallery_layer=args.gallery_layer, gallery_top=args.gallery_top, background_swap=args.background_swap,
        channel_layer=getattr(args, "channel_layer", None), discovery=getattr(args, "discovery", True),
        confirmation=getattr(args, "confirmation", True), shard_size=args.shard_size, threads=args.threads)


def _resolve_method(args: argparse.Namespace, policy: Any) -> None:
    """Command line first, then the policy's [audit] table; else left None for :func:`_default_method`."""
    from_policy = policy is not None and policy.method is not None
    if args.method is None and from_policy:
        args.method = policy.method
        if not args.param:
            args.param = [f"{k}={v}" for k, v in policy.params.items()]
    elif from_policy and args.method != policy.method:
        print(f"note: policy {policy.name!r} sets its thresholds for method {policy.method!r}; this audit uses "
              f"{args.method!r} as asked", file=sys.stderr)
    if args.target is None:
        args.target = (policy.target if policy is not None and policy.target else None) or "label"


def _default_method(args: argparse.Namespace, model: Any) -> None:
    """Grad-CAM, or occlusion for a model without forward hooks (TorchScript), which Grad-CAM needs."""
    if args.method is not None:
        return
    from pellucid.core.audit.settings import default_method

    args.method = default_method(supports_hooks=model.supports_hooks)
    if not model.supports_hooks and not args.quiet:
        print("note: Grad-CAM is unavailable for TorchScript: needs forward hooks; this audit uses occlusion",
              file=sys.stderr)


class _Phases:
    """One progress display per phase of the audit (a bar on a terminal, plain lines elsewhere)."""

    def __init__(self, *, quiet: bool = False) -> None:
        self.quiet = quiet
        self.bar: ProgressBar | None = None

    def phase(self, name: str) -> None:
        self.bar = ProgressBar(name, quiet=self.quiet)

    def __call__(self, done: int, total: int) -> None:
        if self.bar is not None:
            self.bar(done, total)


def _pct(v: float | None) -> str:
    return "n/a" if v is None else f"{100 * v:.1f}%"


def _image_folder_option(args: argparse.Namespace) -> None:
    """--images is the audit's image folder; --data, its old name, still works for now and says so."""
    from pellucid.core.errors import BadParameterError

    if args.old_images is not None:
        if args.images is not None:
            raise BadParameterError("give the image folder once, with --images (--data is its old name)")
        print("pellucid: note: 'audit --data' is now 'audit --images'; --data will be removed", file=sys.stderr)
        args.images = args.old_images
    if args.images is None:
        raise BadParameterError("audit needs --images DIR: a folder of class subfolders or a CSV manifest")


def _audit(args: argparse.Namespace) -> int:
    from pellucid.core.audit import AuditSettings, GallerySpec, load_dataset, run_audit
    from pellucid.core.audit.engine import stop_requests_interrupt
    from pellucid.core.audit.policy import evaluate_policy, load_policy
    from pellucid.core.audit.store import Store, default_data_dir
    from pellucid.core.errors import BadParameterError
    from pellucid.core.model.bundled import resolve_model_ref
    from pellucid.core.model.loading import load_model
    from pellucid.core.provenance import provenance

    _image_folder_option(args)
    if args.out.exists() and not args.out.is_dir():
        raise BadParameterError(f"--out {str(args.out)!r} exists and is not a folder")
    policy = load_policy(args.policy) if args.policy else None
    _resolve_method(args, policy)
    params = _params(args.param)
    if args.method is not None:  # fail on a wrong method or parameter before loading anything
        AuditSettings(method=args.method, params=params, target=args.target,
                      shard_size=args.shard_size, threads=args.threads).validated()
    store = Store(args.store or default_data_dir())
    try:
        model = load_model(resolve_model_ref(args.model), trust_pickled=args.trust_pickled)
        _default_method(args, model)
        from pellucid.core.audit.settings import ConfirmSettings, DiscoverySettings

        settings = AuditSettings(method=args.method, params=params, target=args.target,
                                 shard_size=args.shard_size, threads=args.threads,
                                 discovery=DiscoverySettings() if args.discovery else None,
                                 confirmation=ConfirmSettings() if args.discovery and args.confirmation else None,
                                 channel_layer=args.channel_layer).validated()
        phases = _Phases(quiet=args.quiet)
        phases.phase("reading files")
        dataset = load_dataset(args.images, progress=phases)
        for s in dataset.skipped:
            print(f"skipped {s.rel}: {s.reason}", file=sys.stderr)
        injection = build_injection(args, model, policy)
        gallery = GallerySpec(layer=args.gallery_layer, top=args.gallery_top) if args.gallery_layer else None
        if store.recovered:
            print(f"marked {len(store.recovered)} run(s) left running by a stopped process as interrupted: "
                  + ", ".join(store.recovered), file=sys.stderr)
        with stop_requests_interrupt():  # SIGTERM stops like Ctrl-C: the run is stored as interrupted
            outcome = run_audit(
                model, dataset, store=store, settings=settings, injection=injection,
                background_swap=args.background_swap, gallery=gallery, engine=args.engine, workers=args.workers,
                ray_address=args.ray_address, resume=not args.fresh, command=_command(args),
                trust_pickled=args.trust_pickled, progress=phases, on_phase=phases.phase,
            )
        summary = outcome.summary
        result = evaluate_policy(policy, summary, labels=model.labels) if policy else None
        if result is not None:  # the verdict travels with the run (runs list, report, dashboard)
            outcome.run = store.set_gate(outcome.run.id, result.to_dict())
        args.out.mkdir(parents=True, exist_ok=True)
        doc = {
            "tool": "pellucid",
            "provenance": provenance(),
            "run": outcome.run.to_dict(with_summary=False),
            "resumed": outcome.resumed,
            "images_reused": outcome.reused,
            "images_computed": outcome.computed,
            "model": model.summary(),
            "dataset": dataset.summary(),
            "summary": summary,
            "gate": result.to_dict() if result else None,
            "store": str(store.root.resolve()),
        }
        (args.out / "summary.json").write_text(json.dumps(doc, indent=2, default=_json_default) + "\n",
                                               encoding="utf-8")
        if args.report:
            from pellucid.core.audit.report import write_report

            files = write_report(store, outcome.run.id, args.out)  # shows the verdict stored above
            print(f"report: {', '.join(str(f) for f in files)}")
    finally:
        store.close()

    run = outcome.run
    if outcome.resumed:
        print(f"resumed run {run.id}: {outcome.reused} image(s) already done, {outcome.computed} computed now")
    else:
        print(f"run {run.id}: {outcome.computed} image(s) audited with {settings.method}")
    if outcome.images_per_second:
        print(f"throughput: {outcome.images_per_second:.1f} images/s ({args.engine}, {args.workers} worker(s))")
    print(f"accuracy: {_pct(summary['accuracy'])} over {summary['done']} image(s); "
          f"flagged: {summary['flagged_count']}")
    for flag in summary["class_flags"]:
        print(f"flag: {flag['sentence']}")
    if summary.get("injection"):
        from pellucid.core.audit.sentences import injection_sentence

        print(f"injection: {injection_sentence(summary['injection'])}")
    from pellucid.core.audit.discovery_phase import discovery_lines

    for line in discovery_lines(summary):
        print(line)
    for entry in summary.get("failed", []):
        print(f"not audited: {entry['rel']}: {entry['reason']}")
    print(f"summary: {args.out / 'summary.json'}")
    if result is None:
        return EXIT_OK
    for check in result.checks:
        if check.status == "fail":
            print(f"FAIL {check.sentence}")
    if result.passed:
        print(f"gate: PASS — all {len(result.checks)} check(s) of policy {result.policy.name!r} hold")
        return EXIT_OK
    print(f"gate: FAIL — {len(result.failures)} of {len(result.checks)} check(s) of policy "
          f"{result.policy.name!r} failed")
    return EXIT_GATE_FAILED


def _json_default(value: Any) -> Any:
    import numpy as np

    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    if isinstance(value, (Path, tuple)):
        return str(value) if isinstance(value, Path) else list(value)
    raise TypeError(f"not JSON-able: {type(value).__name__}")
