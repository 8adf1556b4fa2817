"""``pellucid report``: write a stored audit run as a reviewer's HTML report and its PDF."""

from __future__ import annotations

import argparse
from pathlib import Path


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "report",
        help="write a stored audit run as a self-contained HTML report and a PDF",
        description="Write report.html (pictures inline, no external files) and report.pdf (the same document "
                    "printed) for one stored audit run: a summary page with the verdict, the numbers that decided "
                    "it and the most suspicious clusters or flagged images; the evidence; an empty sign-off block "
                    "for the reviewer; and an appendix with settings, spec, fingerprints, versions and the command "
                    "that re-runs it.",
    )
    p.add_argument("run", help="run id (or a unique prefix); 'pellucid runs list' shows them")
    p.add_argument("--out", type=Path, required=True, metavar="DIR", help="folder to write the report into")
    p.add_argument("--policy", type=Path, default=None, metavar="POLICY.toml",
                   help="judge the run's stored measures against this policy (nothing is re-run); without it the "
                        "report shows the verdict stored with the run")
    p.add_argument("--store", type=Path, default=None, metavar="DIR",
                   help="data folder (default: $PELLUCID_DATA or ./.pellucid)")
    p.add_argument("--no-pdf", dest="pdf", action="store_false", help="write the HTML report only")
    p.add_argument("--paper", choices=("a4", "letter"), default="a4",
                   help="page size of the PDF (and of the HTML when printed): a4 (default) or letter")
    p.set_defaults(func=_report)


def _report(args: argparse.Namespace) -> int:
    from pellucid.core.audit.policy import load_policy
    from pellucid.core.audit.report import write_report
    from pellucid.core.audit.store import Store, default_data_dir
    from pellucid.core.errors import BadParameterError

    if args.out.exists() and not args.out.is_dir():
        raise BadParameterError(f"--out {str(args.out)!r} exists and is not a folder")
    policy = load_policy(args.policy) if args.policy else None
    with Store(args.store or default_data_dir()) as store:
        files = write_report(store, args.run, args.out, policy=policy, pdf=args.pdf, paper=args.paper)
        run = store.get_run(args.run)
    for f in files:
        print(f"wrote {f}")
    from pellucid.core.audit.policy import evaluate_policy, gate_of, gate_sentence

    if policy is not None:
        gate = evaluate_policy(policy, run.summary or {}, labels=(run.summary or {}).get("labels", [])).to_dict()
        print(f"{gate_sentence(gate)} (judged now from the stored measures; the audit was not re-run)")
    elif gate_of(run):
        print(f"{gate_sentence(gate_of(run))} (stored with the run)")
    else:
        print("gate: no policy judged this run; --policy FILE judges its stored measures")
    return 0
