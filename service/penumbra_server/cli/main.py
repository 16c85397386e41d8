"""The `penumbra` command: serve, demo, runs, watch, report.

    penumbra serve  [--config FILE] [--listen HOST:PORT] [--archive-root DIR] [--workers N]
                    [--engine process|dask] [--dask-scheduler ADDRESS | --dask-local-workers N]
                    [--tls-cert PEM --tls-key PEM [--tls-client-ca PEM]] [--token-file TOML]
                    [--trusted-network] [--option KEY=VALUE] [--print-config]
    penumbra demo   [--workdir DIR] [--no-crop] [--no-control]
    penumbra token  --role admin|reader|opener --name NAME [--token-file TOML]
    penumbra runs   [--server HOST:PORT] [--token-file FILE] [--tls-ca PEM]
    penumbra watch  RUN_ID [--server HOST:PORT] [--once] [--interval S]
    penumbra report ARCHIVE [--output DIR] [--times T,T,...] [--plane xy|xz|yz]

Every subcommand prints a one-line reason and exits non-zero on bad input or an unreachable
server; ``--help`` on each explains the options.
"""

from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path

__all__ = ["main", "build_parser", "parse_address", "DEFAULT_PORT", "DEFAULT_LISTEN"]

DEFAULT_PORT = 50717
DEFAULT_LISTEN = f"127.0.0.1:{DEFAULT_PORT}"


def parse_address(text: str) -> str:
    """Check ``host:port`` (``[v6]:port`` allowed, port 0..65535); return it unchanged."""
    host, sep, port = str(text).rpartition(":")
    if not sep or not host:
        raise argparse.ArgumentTypeError(f"expected HOST:PORT (e.g. {DEFAULT_LISTEN}), got {text!r}")
    try:
        number = int(port)
    except ValueError:
        raise argparse.ArgumentTypeError(f"port: expected an integer 0..65535, got {port!r} in {text!r}") from None
    if not 0 <= number <= 65535:
        raise argparse.ArgumentTypeError(f"port: expected an integer 0..65535, got {number} in {text!r}")
    return text


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a positive integer, got {text!r}") from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"expected a positive integer, got {value}")
    return value


def _positive_float(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a positive number, got {text!r}") from None
    if not value > 0:
        raise argparse.ArgumentTypeError(f"expected a positive number, got {value}")
    return value


def _times(text: str) -> tuple[float, ...]:
    try:
        return tuple(float(t) for t in text.split(",") if t.strip())
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected comma-separated times in M (e.g. 0,2.5,4), got {text!r}") from None


def _default_server() -> str:
    return os.environ.get("PENUMBRA_SERVER", DEFAULT_LISTEN)


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="penumbra",
        description="Remote apparent-horizon service for numerical-relativity runs.",
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", required=True)

    p = sub.add_parser("serve", help="run a Penumbra server", description=(
        "Run the server until SIGINT/SIGTERM. Binds 127.0.0.1 unless told otherwise: give the node's "
        "address reachable from the evolution's nodes with --listen; beyond loopback the server wants TLS "
        "and tokens (or --trusted-network). Options override the --config file, which overrides the defaults."))
    # Every default is None here: only options actually given override the config file.
    p.add_argument("--config", type=Path, default=None, help="TOML configuration file (see --print-config)")
    p.add_argument("--print-config", action="store_true",
                   help="print the effective configuration as TOML and exit")
    p.add_argument("--listen", type=parse_address, default=None,
                   help=f"HOST:PORT to bind (default {DEFAULT_LISTEN}; port 0 picks a free one)")
    p.add_argument("--archive-root", type=Path, default=None,
                   help="directory holding one <run_id>.zarr per run (default ./penumbra-archive)")
    p.add_argument("--workers", type=_positive_int, default=None,
                   help="finder worker processes (default: cores - 1, at least 1)")
    p.add_argument("--engine", choices=("process", "dask"), default=None,
                   help="where finder jobs run: local worker processes (default) or a Dask cluster")
    p.add_argument("--dask-scheduler", default=None, metavar="ADDRESS",
                   help="with --engine dask: a running Dask scheduler, e.g. tcp://node17:8786")
    p.add_argument("--dask-local-workers", type=_positive_int, default=None, metavar="N",
                   help="with --engine dask: start a local Dask cluster of N worker processes instead")
    p.add_argument("--ready-file", type=Path, default=None,
                   help="write the bound HOST:PORT to this file once serving (for scripts)")
    p.add_argument("--grace", type=_positive_float, default=None,
                   help="seconds in-flight calls get to finish on shutdown (default 5)")
    p.add_argument("--slices-in-flight", type=_positive_int, default=None, metavar="N",
                   help="slices of one run searched at once (default 1; 2 keeps the workers busy when one "
                        "run's slices come faster than a slice is processed; results stay in iteration order)")
    p.add_argument("--no-common-horizon", dest="common_horizon", action="store_const", const=False, default=None,
                   help="look for each expected body only, never for a common surface of a pair")
    p.add_argument("--tls-cert", type=Path, default=None, help="server certificate (PEM); enables TLS")
    p.add_argument("--tls-key", type=Path, default=None, help="private key of --tls-cert (PEM)")
    p.add_argument("--tls-client-ca", type=Path, default=None,
                   help="CA (PEM) that must have signed every client's certificate (mutual TLS)")
    p.add_argument("--token-file", type=Path, action="append", default=None,
                   help="TOML file of [[token]] tables (name, role admin|reader|opener, sha256); repeatable")
    p.add_argument("--trusted-network", action="store_const", const=True, default=None,
                   help="allow listening beyond loopback without TLS and tokens (only trusted hosts reach it)")
    p.add_argument("--option", action="append", default=None, metavar="KEY=VALUE",
                   help="a server option of the config's [options] table, e.g. max_slice_bytes=1073741824")
    p.set_defaults(handler=_cmd_serve)

    p = sub.add_parser("demo", help="run the invented binary-black-hole demo end to end", description=(
        "Start a server on a loopback port, run an invented 'evolution' process that sends "
        "Brill-Lindquist slices through the shim, follow the results, write plots and a summary."))
    p.add_argument("--workdir", type=Path, default=Path("penumbra-demo-output"),
                   help="directory for the archive, plots and logs (default ./penumbra-demo-output)")
    p.add_argument("--workers", type=_positive_int, default=2, help="finder worker processes (default 2)")
    p.add_argument("--seconds-per-slice", type=float, default=None,
                   help="pretend evolution cost between slices, s (default 3.5 with the control run, 2.5 without)")
    p.add_argument("--max-slices", type=_positive_int, default=None,
                   help="stop the evolution after this many slices (default: the whole track)")
    p.add_argument("--lmax", type=_positive_int, default=None, help="finder l_max (default: the demo's)")
    p.add_argument("--steering-interval", type=_positive_float, default=None,
                   help="steering interval the evolution states in its run spec, M (default: two slice intervals)")
    p.add_argument("--no-crop", dest="crop", action="store_false",
                   help="send slices whole instead of cropped to the server's data windows")
    p.add_argument("--no-control", dest="control", action="store_false",
                   help="skip the control run that gets every slice whole (halves the server's work; "
                        "the summary then cannot say whether cropping changed the surfaces)")
    p.set_defaults(handler=_cmd_demo)

    p = sub.add_parser("token", help="make a bearer token and record its digest in a token file", description=(
        "Print a new random token (256 bits) and append its SHA-256 with NAME and ROLE to the token file "
        "that `penumbra serve --token-file` reads. Roles: admin (list runs, everything but writing), reader "
        "(describe and watch runs), opener (open runs; each run's writer token comes back from OpenRun)."))
    p.add_argument("--role", required=True, choices=("admin", "reader", "opener"), help="what the token may do")
    p.add_argument("--name", required=True, help="who holds it (shown in refusals, never the token)")
    p.add_argument("--token-file", type=Path, default=None,
                   help="append the digest here (created with mode 0600); without it, only print the token")
    p.set_defaults(handler=_cmd_token)

    p = sub.add_parser("runs", help="list runs on a server")
    p.add_argument("--server", type=parse_address, default=_default_server(),
                   help="server HOST:PORT (default $PENUMBRA_SERVER or 127.0.0.1:50717)")
    _add_client_security(p)
    p.add_argument("--timeout", type=_positive_float, default=5.0,
                   help="seconds to keep trying an unreachable server (default 5)")
    p.set_defaults(handler=_cmd_runs)

    p = sub.add_parser("watch", help="follow one run live in the terminal", description=(
        "Redraw a table of the run's surfaces (found or not, area, irreducible mass, centre, residual, "
        "lag) until the run closes. Without a terminal each frame is printed in turn."))
    p.add_argument("run_id", help="the run to follow (see `penumbra runs`)")
    p.add_argument("--server", type=parse_address, default=_default_server(),
                   help="server HOST:PORT (default $PENUMBRA_SERVER or 127.0.0.1:50717)")
    _add_client_security(p)
    p.add_argument("--once", action="store_true", help="print one frame and exit")
    p.add_argument("--interval", type=_positive_float, default=1.0, help="seconds between frames (default 1)")
    p.add_argument("--timeout", type=_positive_float, default=5.0,
                   help="seconds to keep trying an unreachable server (default 5)")
    p.set_defaults(handler=_cmd_watch)

    p = sub.add_parser("report", help="plots and a text summary from a run's archive")
    p.add_argument("archive", type=Path, help="<archive_root>/<run_id>.zarr")
    p.add_argument("--output", type=Path, default=None, help="output directory (default <archive>-report)")
    p.add_argument("--times", type=_times, default=None,
                   help="comma-separated times (M) for horizon cross-sections (default: chosen from the run)")
    p.add_argument("--plane", choices=("xy", "xz", "yz"), default="xy",
                   help="orbital plane for tracks and cross-sections (default xy)")
    p.set_defaults(handler=_cmd_report)
    return parser


def _fail(message: str, code: int = 2) -> int:
    print(f"penumbra: {message}", file=sys.stderr)
    return code


def _add_client_security(p: argparse.ArgumentParser) -> None:
    p.add_argument("--token-file", type=Path, default=_env_path("PENUMBRA_TOKEN_FILE"),
                   help="file holding a reader or admin token (default $PENUMBRA_TOKEN_FILE)")
    p.add_argument("--tls-ca", type=Path, default=_env_path("PENUMBRA_TLS_CA"),
                   help="connect with TLS, trusting this CA certificate (PEM; default $PENUMBRA_TLS_CA)")


def _env_path(name: str) -> Path | None:
    value = os.environ.get(name)
    return Path(value) if value else None


def serve_config_from_args(args):
    """The effective configuration of `penumbra serve`: defaults, the --config file, then options."""
    from penumbra_server.server.config import default_config, load_config_file, merge, option_fields

    config = default_config()
    if args.config is not None:
        config = load_config_file(args.config, config)
    given = {
        "server": {"listen": args.listen, "archive_root": args.archive_root, "workers": args.workers,
                   "engine": args.engine, "ready_file": args.ready_file, "grace_s": args.grace,
                   "trusted_network": args.trusted_network},
        "dask": {"scheduler": args.dask_scheduler, "local_workers": args.dask_local_workers},
        "tls": {"certificate": args.tls_cert, "private_key": args.tls_key, "client_ca": args.tls_client_ca},
        "auth": {"token_files": args.token_file},
        "options": {"common_horizon": args.common_horizon, "slices_in_flight": args.slices_in_flight},
    }
    if args.dask_scheduler is not None and args.dask_local_workers is not None:
        raise ValueError("--dask-scheduler, --dask-local-workers: give one of them, not both")
    # One of them on the command line replaces the other from the config file.
    if args.dask_scheduler is not None:
        given["dask"]["local_workers"] = 0
    elif args.dask_local_workers is not None:
        given["dask"]["scheduler"] = ""
    kinds = option_fields()
    for item in args.option or ():
        key, sep, text = item.partition("=")
        if not sep or key not in kinds:
            raise ValueError(f"--option: expected KEY=VALUE with KEY one of {', '.join(kinds)}, got {item!r}")
        given["options"][key] = _option_value(key, kinds[key], text)
    given = {section: {k: v for k, v in values.items() if v is not None} for section, values in given.items()}
    return merge(config, given, base=Path.cwd(), source="command line")


def _option_value(key: str, kind: type, text: str):
    try:
        if kind is bool:
            if text.lower() not in ("true", "false"):
                raise ValueError
            return text.lower() == "true"
        return kind(float(text)) if kind is int and "e" in text.lower() else kind(text)
    except ValueError:
        raise ValueError(f"--option {key}: expected {kind.__name__}, got {text!r}") from None


def _cmd_token(args) -> int:
    from penumbra_server.cli.token import make_token

    try:
        token = make_token(role=args.role, name=args.name, token_file=args.token_file)
    except (OSError, ValueError) as err:
        return _fail(str(err))
    print(token)
    return 0


def _cmd_serve(args) -> int:
    from penumbra_server.cli.serve import serve_config
    from penumbra_server.server.config import format_toml

    try:
        config = serve_config_from_args(args)
    except ValueError as err:  # ConfigError included: the message names the setting
        return _fail(str(err))
    if args.print_config:
        print(format_toml(config), end="")
        return 0
    return serve_config(config)


def _connect(address: str, timeout_s: float, args=None):
    import penumbra_shim as ps

    token = None
    token_file = getattr(args, "token_file", None)
    try:
        if token_file is not None:
            token = Path(token_file).read_text().strip()
        # A person at a terminal: give up on an unreachable server after a few seconds, not 30.
        return ps.connect(address, deadline_s=max(timeout_s, 1.0), retry_budget_s=timeout_s, token=token,
                          root_certificates=getattr(args, "tls_ca", None))
    except OSError as err:
        raise SystemExit(_fail(f"--token-file: cannot read {token_file}: {err.strerror}"))
    except ValueError as err:
        raise SystemExit(_fail(str(err)))


def _cmd_runs(args) -> int:
    import penumbra_shim as ps

    client = _connect(args.server, args.timeout, args)
    try:
        runs = client.list_runs()
    except ps.PenumbraError as err:
        return _fail(f"cannot list runs on {args.server} (is `penumbra serve` running there?): {err}", 1)
    finally:
        client.close()
    print(format_runs(runs))
    return 0


def format_runs(runs) -> str:
    """A table of the shim's ``RunInfo`` objects (names and every other cell made terminal-safe)."""
    import time

    from penumbra_server.cli.safe_text import terminal_safe

    columns = ["run id", "name", "state", "created", "received", "processed", "skipped", "archive"]
    rows = []
    for r in runs:
        created = getattr(r, "created_unix_s", None)
        rows.append([terminal_safe(cell) for cell in (
            r.run_id, r.name, r.state,
            time.strftime("%Y-%m-%d %H:%M", time.localtime(created)) if created else "-",
            r.slices_received, r.slices_processed, r.slices_skipped, r.archive_path or "-",
        )])
    if not rows:
        return "no runs"
    widths = [max(len(columns[i]), *(len(row[i]) for row in rows)) for i in range(len(columns))]
    lines = ["  ".join(c.ljust(w) for c, w in zip(columns, widths))]
    lines += ["  ".join(c.ljust(w) for c, w in zip(row, widths)) for row in rows]
    return "\n".join(lines)


def _cmd_watch(args) -> int:
    import penumbra_shim as ps

    from penumbra_server.cli.watch import watch_run

    client = _connect(args.server, args.timeout, args)
    try:
        return watch_run(client, args.run_id, once=args.once, interval_s=args.interval, server=args.server)
    except ps.RunNotFoundError:
        return _fail(f"run {args.run_id!r} not found on {args.server}; `penumbra runs --server {args.server}` lists them", 1)
    except ps.PenumbraError as err:
        return _fail(f"cannot watch {args.run_id!r} on {args.server} (is `penumbra serve` running there?): {err}", 1)
    finally:
        client.close()


def _cmd_report(args) -> int:
    from penumbra_server.cli.report import summary_text, write_report

    output = args.output or args.archive.with_name(args.archive.name.removesuffix(".zarr") + "-report")
    try:
        result = write_report(args.archive, output, times=args.times, plane=args.plane)
    except FileNotFoundError as err:
        return _fail(str(err))
    print(summary_text(result.summary), end="")
    for path in result.plots + (result.summary_path,):
        print(f"wrote {path}")
    return 0


def _cmd_demo(args) -> int:
    from penumbra_server.cli.demo import run_demo

    return run_demo(workdir=args.workdir, workers=args.workers, seconds_per_slice=args.seconds_per_slice,
                    max_slices=args.max_slices, lmax=args.lmax, crop=args.crop, control=args.control,
                    steering_interval=args.steering_interval)


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    return int(args.handler(args) or 0)


if __name__ == "__main__":
    sys.exit(main())
