"""``pellucid serve``: start the dashboard."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "serve",
        help="start the dashboard in your browser (http://127.0.0.1:8000)",
        description="Start the Pellucid dashboard and its JSON API. It listens on 127.0.0.1 only by default; "
                    "see the README's Security section before listening elsewhere or behind a proxy.",
    )
    p.add_argument("--model", action="append", default=None, metavar="SPEC",
                   help="a model spec file or a bundled model name; repeat for several (default: tilenet)")
    p.add_argument("--images", type=Path, default=None, metavar="DIR",
                   help="a folder of images to browse and audit from the pages (nothing outside it is read)")
    p.add_argument("--models", type=Path, default=None, metavar="DIR", dest="models_dir",
                   help="a folder of model spec files (.toml) that the pages may add models from while the "
                        "server runs (chosen by name from a list; nothing outside the folder is read)")
    p.add_argument("--host", default="127.0.0.1", help="address to listen on (default 127.0.0.1)")
    p.add_argument("--port", type=int, default=8000, help="port (default 8000)")
    p.add_argument("--store", type=Path, default=None, metavar="DIR",
                   help="folder for stored audit runs, opened images and their maps (default: $PELLUCID_DATA or "
                        "./.pellucid)")
    p.add_argument("--data", type=Path, default=None, dest="old_store", help=argparse.SUPPRESS)
    p.add_argument("--token", default=None,
                   help="access token to require, at least 16 characters "
                        "(default: none on 127.0.0.1; generated and printed on other addresses)")
    p.add_argument("--allow-host", action="append", default=[], metavar="NAME",
                   help="another name the server answers to without a token (e.g. an alias of this machine "
                        "in /etc/hosts); 127.0.0.1, localhost and [::1] always work")
    p.add_argument("--image-memory", type=int, default=512, metavar="MB",
                   help="memory for decoded images the server holds; the least recently used go first (default 512)")
    p.add_argument("--job-memory", type=int, default=2048, metavar="MB",
                   help="estimated memory one map's or audit's batches may take; more is refused (default 2048)")
    p.add_argument("--max-occlusion-positions", type=int, default=20_000, metavar="N",
                   help="occlusion grids with more patch positions are refused (default 20000)")
    p.add_argument("--trust-pickled", action="store_true",
                   help="allow specs of kind 'pickled' (unpickling runs code from the file; only for your own files)")
    p.set_defaults(func=_serve, hold_output=False)  # a server's log must show as it happens


def _serve(args: argparse.Namespace) -> int:
    import uvicorn

    from pellucid.core.audit.store import Store, default_data_dir
    from pellucid.core.errors import BadParameterError, DataError
    from pellucid.core.model.bundled import resolve_model_ref
    from pellucid.web.app import create_app
    from pellucid.web.security import display_base_url
    from pellucid.web.settings import MiB, Settings

    if args.old_store is not None:
        if args.store is not None:
            raise BadParameterError("give the store's folder once, with --store (--data is its old name)")
        print("pellucid: note: 'serve --data' is now 'serve --store'; --data will be removed", file=sys.stderr)
        args.store = args.old_store
    if not 1 <= args.port <= 65535:
        raise BadParameterError(f"--port must be from 1 to 65535; received {args.port}")
    for flag, value in (("--image-memory", args.image_memory), ("--job-memory", args.job_memory),
                        ("--max-occlusion-positions", args.max_occlusion_positions)):
        if value < 1:
            raise BadParameterError(f"{flag} must be a positive whole number; received {value}")
    models = tuple(str(resolve_model_ref(m)) for m in (args.model or ["tilenet"]))
    if args.images is not None and not args.images.is_dir():
        raise DataError(f"--images {str(args.images)!r} is not a folder")
    if args.models_dir is not None and not args.models_dir.is_dir():
        raise DataError(f"--models {str(args.models_dir)!r} is not a folder")
    settings = Settings(
        host=args.host,
        port=args.port,
        models=models,
        image_root=args.images.resolve() if args.images else None,
        models_dir=args.models_dir.resolve() if args.models_dir else None,
        data_dir=args.store or default_data_dir(),
        trust_pickled=args.trust_pickled,
        token=args.token,
        allowed_hosts=tuple(args.allow_host),
        max_image_memory=args.image_memory * MiB,
        max_job_memory=args.job_memory * MiB,
        max_occlusion_positions=args.max_occlusion_positions,
    )
    # Refuse an unusable store now, with one plain line, rather than on the first audit.
    Store(settings.data_dir).close()
    app = create_app(settings)
    base = display_base_url(args.host, args.port)
    print(f"Pellucid dashboard on {base}/  (Ctrl+C to stop)")
    if app.state.guard is not None:
        print(f"access token (send as 'Authorization: Bearer …'): {app.state.guard.token}")
        print(f"one-time sign-in link for a browser: {app.state.guard.sign_in_link(base)}")
    # proxy_headers=False: the client's address is the socket's, never a header a page could set.
    uvicorn.run(app, host=args.host.strip("[]"), port=args.port, log_level="warning", proxy_headers=False,
                server_header=False)
    return 0
