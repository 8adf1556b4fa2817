"""``pellucid serve``: start the dashboard."""

from __future__ import annotations

import argparse
from pathlib import Path


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser(
        "serve",
        help="start the dashboard in your browser (http://127.0.0.1:8000)",
        description="Start the Pellucid dashboard and its JSON API. It listens on 127.0.0.1 only by default.",
    )
    p.add_argument("--model", action="append", default=None, metavar="SPEC",
                   help="a model spec file or a bundled model name; repeat for several (default: tilenet)")
    p.add_argument("--images", type=Path, default=None, metavar="DIR",
                   help="a folder of images to browse from the image page (nothing outside it is served)")
    p.add_argument("--host", default="127.0.0.1", help="address to listen on (default 127.0.0.1)")
    p.add_argument("--port", type=int, default=8000, help="port (default 8000)")
    p.add_argument("--data", type=Path, default=Path(".pellucid"), metavar="DIR",
                   help="folder for stored audit runs and artefacts (default ./.pellucid)")
    p.add_argument("--token", default=None,
                   help="access token to require "
                        "(default: none on 127.0.0.1; generated and printed on other addresses)")
    p.add_argument("--trust-pickled", action="store_true",
                   help="allow specs of kind 'pickled' (unpickling runs code from the file; only for your own files)")
    p.set_defaults(func=_serve)


def _serve(args: argparse.Namespace) -> int:
    import uvicorn

    from pellucid.core.errors import DataError
    from pellucid.core.model.bundled import resolve_model_ref
    from pellucid.web.app import create_app
    from pellucid.web.settings import Settings

    models = tuple(str(resolve_model_ref(m)) for m in (args.model or ["tilenet"]))
    if args.images is not None and not args.images.is_dir():
        raise DataError(f"--images {str(args.images)!r} is not a folder")
    settings = Settings(
        host=args.host,
        port=args.port,
        models=models,
        image_root=args.images.resolve() if args.images else None,
        data_dir=args.data,
        trust_pickled=args.trust_pickled,
        token=args.token,
    )
    # Refuse an unusable data folder now, with one plain line, rather than on the first audit.
    from pellucid.core.audit.store import Store

    Store(settings.data_dir).close()
    app = create_app(settings)
    base = f"http://{args.host}:{args.port}"
    print(f"Pellucid dashboard on {base}/  (Ctrl+C to stop)")
    if app.state.guard is not None:
        print(f"access token (send as 'Authorization: Bearer …'): {app.state.guard.token}")
        print(f"one-time sign-in link for a browser: {app.state.guard.sign_in_link(base)}")
    uvicorn.run(app, host=args.host, port=args.port, log_level="warning")
    return 0
