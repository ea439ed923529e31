"""The ``trimtab`` command line.

Exit status: 0 success, 2 bad arguments or config (the message names the key), 1 anything else.
Progress goes to stderr; results to stdout or files. Each subcommand's work lives in its own
module (``replay``, ``demo``, ``app``); this file only parses arguments and maps errors to exit codes.
"""

from __future__ import annotations

import argparse
import json
import sys

__all__ = ["main"]


class _Parser(argparse.ArgumentParser):
    def error(self, message):  # argparse exits 2 as well; keep its usage line, our wording
        self.print_usage(sys.stderr)
        print(f"trimtab: error: {message}", file=sys.stderr)
        raise SystemExit(2)


def build_parser() -> argparse.ArgumentParser:
    p = _Parser(prog="trimtab", description="Online linear models on a live event feed: learn, score, "
                                             "monitor, replay.")
    sub = p.add_subparsers(dest="command", required=True, parser_class=_Parser)

    d = sub.add_parser("demo", help="replay the cold-chain demo feed under two configs and write the report")
    d.add_argument("--out", default="trimtab-demo", help="output folder (default: %(default)s)")
    d.add_argument("--events", type=int, default=None, help="build a fresh demo feed of this many events")

    s = sub.add_parser("serve", help="run the service")
    s.add_argument("-c", "--config", required=True, help="config file (TOML)")
    s.add_argument("--host", default=None, help="override service.host")
    s.add_argument("--port", type=int, default=None, help="override service.port")
    s.add_argument("--data-dir", default=None, help="override service.data_dir")
    s.add_argument("--role", choices=("learner", "scorer"), default="learner",
                   help="learner (default): the single writer, with its local scorers; scorer: serve /v1/score "
                        "from the model a learner publishes to Redis ([publish] section), on any machine")
    s.add_argument("--start-from", default=None, metavar="DIR/NAME",
                   help="start an empty data dir from the final state of a replay run (its folder, with state.bin)")

    r = sub.add_parser("replay", help="replay recorded feeds offline (-c ... --out) or into a service (--to)")
    r.add_argument("feeds", nargs="+", help="NDJSON, CSV or Parquet files (.gz allowed)")
    r.add_argument("-c", "--config", action="append", default=[], help="config file; repeat for side-by-side runs")
    r.add_argument("--out", default=None, help="output folder for summary.json, report.html, <name>/model.json")
    r.add_argument("--to", default=None, help="base URL of a running service to replay into")
    r.add_argument("--speed", type=float, default=None, help="with --to: recorded pace times X (default: as fast as accepted)")
    r.add_argument("--token-env", default="TRIMTAB_TOKEN", help="with --to: environment variable holding the token")
    r.add_argument("--batch", type=int, default=1000, help="with --to: events per request (default: %(default)s)")
    r.add_argument("--jobs", type=int, default=None, help="parallel processes for several configs")
    r.add_argument("--no-progress", action="store_true", help="no progress bar on stderr")
    r.add_argument("--no-report", action="store_true", help="write summary.json and model.json, not report.html")
    r.add_argument("--exact-parse", action="store_true",
                   help="parse NDJSON line by line (orjson) instead of with Arrow; same results, slower")

    w = sub.add_parser("sweep", help="replay a feed under a grid of configs derived from a base, on Dask, and rank them",
                       description="Derive one config per combination of the --vary values, validate them all, "
                                   "replay each on Dask and rank the runs by held-out and progressive loss. "
                                   "Exit status 1 if a run failed (the others are still written).")
    w.add_argument("feeds", nargs="+", help="NDJSON, CSV or Parquet files (.gz allowed), or http(s) URLs; with "
                                            "--cluster every worker must reach them (a shared path or a URL)")
    w.add_argument("-c", "--config", required=True, help="the base config (TOML)")
    w.add_argument("--vary", action="append", default=[], metavar="KEY=V1,V2,...",
                   help="a dotted config key and its values, e.g. steps.rule=anytime,sqrt_decay; repeat for a grid")
    w.add_argument("--out", required=True, help="output folder: sweep.json, sweep.html, <run>/ with config and state")
    w.add_argument("--workers", type=int, default=None,
                   help="worker processes of the local Dask cluster on 127.0.0.1 (default: one per core)")
    w.add_argument("--cluster", default=None, metavar="ADDRESS",
                   help="a running Dask scheduler (tcp://host:port) instead of a local cluster; its workers "
                        "need trimtab installed and must reach the feeds")
    w.add_argument("--parse-each-run", action="store_true",
                   help="every run parses the feeds itself; by default the sweep parses them once and sends every "
                        "worker a copy of the chunks (feeds up to 1 GiB)")
    w.add_argument("--no-progress", action="store_true", help="no progress lines on stderr")
    w.add_argument("--no-report", action="store_true", help="write sweep.json and the runs' files, not sweep.html")

    c = sub.add_parser("check-config", help="validate a config and print the resolved settings")
    c.add_argument("config")
    return p


def _check_config(args) -> int:
    from service.config import load_config

    from models import certificate

    cfg = load_config(args.config)
    spec = cfg.model_spec()
    # the certificate of a model that has learned nothing yet (what LinearModel(spec).certificate()
    # gives), without building one: that would load numba, a third of this command's time
    cert = certificate(spec, 0, spec.grad_bound, grad_estimated=spec.grad_bound is None, step_scale=1.0)
    out = {"config": cfg.resolved(), "dimension": spec.dim() + (1 if spec.fit_intercept else 0), "certificate": cert}
    print(json.dumps(out, indent=2))
    return 0


def main(argv: list[str] | None = None) -> int:
    return _run(build_parser().parse_args(argv))


def _run(args) -> int:
    from models import InvalidSettings, TrimtabError
    from service.replay.report import ReportFailed
    from service.storage.dirlock import DataDirLocked

    try:
        if args.command == "check-config":
            return _check_config(args)
        if args.command == "serve":
            from service.http.app import serve_main

            return serve_main(args)
        if args.command == "replay":
            from service.replay.runner import replay_main

            return replay_main(args)
        if args.command == "sweep":
            from service.replay.sweep import sweep_main

            return sweep_main(args)
        if args.command == "demo":
            from service.replay.demo import demo_main

            return demo_main(args)
    except DataDirLocked as exc:
        print(f"trimtab: error: {exc.message}", file=sys.stderr)
        return 2
    except InvalidSettings as exc:
        print(f"trimtab: config error: {exc}", file=sys.stderr)
        return 2
    except TrimtabError as exc:
        print(f"trimtab: error: {exc}", file=sys.stderr)
        return 1
    except ReportFailed as exc:
        print(f"trimtab: error: the report failed, no report.html was written: {exc}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("trimtab: interrupted", file=sys.stderr)
        return 1
    except OSError as exc:
        print(f"trimtab: error: {exc}", file=sys.stderr)
        return 1
    finally:
        _build_kernels_later()
    return 1


def _build_kernels_later() -> None:
    """A command that ran its kernels on numba's JIT because the ahead-of-time modules were missing
    starts their build in the background, for the next command (:mod:`service.kernels`)."""
    if "service.kernels" in sys.modules:
        sys.modules["service.kernels"].build_later()


if __name__ == "__main__":
    sys.exit(main())
