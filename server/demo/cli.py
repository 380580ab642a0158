"""`trialhouse demo`: seed the invented pilot into a fresh data directory, print the sign-ins, serve it."""

from __future__ import annotations

import argparse
import datetime as dt
import sys
from pathlib import Path

from server.demo import scenario, seed

DEFAULT_DIR = Path("./var/demo")


def register(sub: argparse._SubParsersAction, storage: argparse._SubParsersAction) -> None:  # type: ignore[type-arg]
    p = sub.add_parser(
        "demo",
        help="seed an invented pilot into its own data directory and serve it",
        description="Seed the invented Fennick Vale pilot through the real device API and "
        "staff services into a fresh SQLite data directory, print a sign-in for "
        "each role, and serve the app.",
    )
    p.add_argument(
        "--data-dir",
        type=Path,
        default=DEFAULT_DIR,
        help=f"the demo's own data directory (default {DEFAULT_DIR}); an earlier demo there is "
        "replaced, anything else is refused",
    )
    p.add_argument("--seed", type=int, default=1, help="the same seed gives the same pilot (default 1)")
    p.add_argument(
        "--homes",
        type=int,
        default=36,
        help=f"installed homes, {scenario.MIN_HOMES} to {scenario.MAX_HOMES} (default 36)",
    )
    p.add_argument(
        "--weeks",
        type=int,
        default=10,
        help=f"length of the pilot, {scenario.MIN_WEEKS} to {scenario.MAX_WEEKS} weeks (default 10)",
    )
    p.add_argument(
        "--starts-on",
        help="the pilot's first day, YYYY-MM-DD; it then runs whole weeks "
        "(default: it began --weeks weeks ago and runs until now)",
    )
    p.add_argument("--no-serve", action="store_true", help="seed only")
    p.add_argument(
        "--keep", action="store_true", help="serve the demo already in --data-dir, without seeding it again"
    )
    p.add_argument("--host", default="127.0.0.1")
    p.add_argument("--port", type=int, default=8000)
    p.add_argument("--log-level", default="warning")
    p.set_defaults(func=cmd_demo)


def _fail(message: str) -> Exception:
    # An AppError: `trialhouse` prints its message and exits with status 2.
    return seed.DemoError(message, code="invalid_demo_option", status=422)


def cmd_demo(args: argparse.Namespace, _settings: object) -> int:
    data_dir: Path = args.data_dir
    if args.keep:
        marker = seed.read_marker(data_dir)
        if marker is None or not marker.get("complete"):
            raise _fail(f"{data_dir} holds no finished demo; run `trialhouse demo` without --keep first.")
        sign_ins = seed.sign_ins_from_marker(marker)
        print(
            f"Serving the demo seeded in {data_dir} on {marker.get('seeded_at', '?')[:10]} "
            f"(seed {marker.get('seed')}, {marker.get('homes')} homes, {marker.get('weeks')} weeks)."
        )
    else:
        if not scenario.MIN_HOMES <= args.homes <= scenario.MAX_HOMES:
            raise _fail(f"--homes must be between {scenario.MIN_HOMES} and {scenario.MAX_HOMES}.")
        if not scenario.MIN_WEEKS <= args.weeks <= scenario.MAX_WEEKS:
            raise _fail(f"--weeks must be between {scenario.MIN_WEEKS} and {scenario.MAX_WEEKS}.")
        starts_on = None
        if args.starts_on:
            try:
                starts_on = dt.date.fromisoformat(args.starts_on)
            except ValueError as exc:
                raise _fail(f"--starts-on is YYYY-MM-DD: {exc}.") from exc
        print(
            f"Seeding the demo pilot into {data_dir} (seed {args.seed}, {args.homes} homes, "
            f"{args.weeks} weeks)...",
            flush=True,
        )
        result = seed.seed_demo(
            data_dir,
            seed=args.seed,
            homes=args.homes,
            weeks=args.weeks,
            starts_on=starts_on,
            progress=lambda m: print(f"  {m}", flush=True),
        )
        print(f"Seeded in {result.seconds:.1f} s.\n")
        for line in scenario.describe(result.plan):
            print(f"  {line}")
        print()
        sign_ins = result.sign_ins
    url = f"http://{args.host}:{args.port}/"
    heading = f"Sign in at {url}" if not args.no_serve else "Sign-ins (serve with `trialhouse demo --keep`)"
    print(f"{heading}:")
    width = max(len(s.email) for s in sign_ins)
    for s in sign_ins:
        print(f"  {s.label:<23} {s.email:<{width}}  {s.password}")
    print(f"(The passwords are kept in {data_dir / seed.MARKER}, readable only by you.)")
    if args.no_serve:
        return 0
    if args.host not in ("127.0.0.1", "localhost", "::1"):
        print(
            "Note: the demo's sign-ins are printed above; do not expose it beyond a trusted network.",
            file=sys.stderr,
        )
    return _serve(data_dir, args.host, args.port, args.log_level)


def _serve(data_dir: Path, host: str, port: int, log_level: str) -> int:
    import uvicorn

    # Here, not at the top: the whole web app (every router, matplotlib) would load for every command.
    from server.app import create_app

    app = create_app(seed.demo_settings(data_dir))
    print(f"Serving on {f'http://{host}:{port}/'} (Ctrl-C stops; the data stays in {data_dir}).", flush=True)
    uvicorn.run(app, host=host, port=port, log_level=log_level, access_log=False)
    return 0
