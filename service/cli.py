"""The ``tidewatch`` command line.

Exit codes
----------
0  success
1  runtime failure (an output refused a write, e.g. its disk is full; the last checkpoint of a run
   could not be saved; input unreadable). The next start resumes from the last checkpoint.
2  usage error or invalid config
3  fatal message-bus error (e.g. the producer was fenced twice); the orchestrator should restart
75  (Kafka worker only) a client call stuck past its deadline; the supervising parent restarts the worker
130  stopped by a second interrupt before a clean shutdown finished
"""

from __future__ import annotations

import argparse
import logging
import os
import signal
import sys
import threading
import time
from collections.abc import Sequence

from service.config import Config, load_config
from service.errors import BusFatalError, ConfigError, TidewatchError
from service.logs import configure_logging
from service.timefmt import parse_duration

__all__ = ["main", "EXIT_OK", "EXIT_FAILURE", "EXIT_USAGE", "EXIT_BUS_FATAL", "EXIT_INTERRUPTED"]

EXIT_OK, EXIT_FAILURE, EXIT_USAGE, EXIT_BUS_FATAL, EXIT_INTERRUPTED = 0, 1, 2, 3, 130

log = logging.getLogger("tidewatch.cli")

EPILOG = "exit codes: 0 ok, 1 runtime failure, 2 usage or config error, 3 fatal bus error, 130 interrupted twice"


def _override_window(config: Config, window: float) -> Config:
    rules = tuple(r.model_copy(update={"window": None}) for r in config.rules)
    return config.model_copy(update={"defaults": config.defaults.model_copy(update={"window": window}), "rules": rules})


def _install_stop_handlers(stop: threading.Event) -> None:
    def handler(signum: int, frame: object) -> None:
        if stop.is_set():
            # Second signal: the operator wants out now.
            os._exit(EXIT_INTERRUPTED)
        log.info("stop requested; finishing the batch and checkpointing", extra={"event": "stop_requested", "signal": signum})
        stop.set()

    signal.signal(signal.SIGTERM, handler)
    signal.signal(signal.SIGINT, handler)


def _state_key() -> bytes | None:
    value = os.environ.get("TIDEWATCH_STATE_KEY")
    return value.encode() if value else None


_WORKER_ENV = "TIDEWATCH_WORKER"


def _die_with_parent() -> None:
    # Linux: the worker gets SIGKILL when the supervisor dies, so a killed supervisor never leaves a
    # worker behind that a restarted one would fence.
    import ctypes

    try:
        ctypes.CDLL("libc.so.6", use_errno=True).prctl(1, signal.SIGKILL)  # PR_SET_PDEATHSIG
    except OSError:
        pass


def _supervise() -> int:
    """Run the Kafka worker as a child process; start it again when it exits to be restarted.

    Only the worker's "restart me" exit (75: a client call stuck for good) is retried here, with a
    back-off; every other exit code is passed on to the orchestrator. Signals are forwarded.
    """
    import subprocess

    from service.kafka_bus import EXIT_STUCK

    child: subprocess.Popen | None = None
    stopping = False

    def forward(signum: int, frame: object) -> None:
        nonlocal stopping
        if signum in (signal.SIGTERM, signal.SIGINT):
            if stopping and child is not None:
                child.kill()
            stopping = True
        if child is not None and child.poll() is None:
            child.send_signal(signum)

    for sig in (signal.SIGTERM, signal.SIGINT, signal.SIGHUP):
        signal.signal(sig, forward)
    backoff = 1.0
    while True:
        env = {**os.environ, _WORKER_ENV: "1"}
        child = subprocess.Popen([sys.executable, "-m", "service.cli", *sys.argv[1:]], env=env,
                                 preexec_fn=_die_with_parent)
        started = time.monotonic()
        code = child.wait()
        if stopping or code != EXIT_STUCK:
            return code if code >= 0 else EXIT_INTERRUPTED
        if time.monotonic() - started > 300:
            backoff = 1.0
        log.warning("worker asked to be restarted; starting a new one",
                    extra={"event": "worker_restart", "exit_code": code, "after_seconds": backoff})
        time.sleep(backoff)
        backoff = min(backoff * 2, 30.0)


def cmd_run(args: argparse.Namespace) -> int:
    config = load_config(args.config)
    configure_logging(args.log_level, config.logging.level)
    stop = threading.Event()
    _install_stop_handlers(stop)
    from service.reload import ConfigReloader

    reloader = ConfigReloader(args.config).install()
    if args.input is None and config.kafka is not None:
        from service.kafka_bus import KafkaRunner

        if os.environ.get(_WORKER_ENV) != "1" and not args.no_supervise:
            return _supervise()
        KafkaRunner(config, stop, state_key=_state_key(), http_listen=args.listen, reloader=reloader).run()
        return EXIT_OK

    from service.embedded import RunOptions, run_embedded

    opts = RunOptions(
        input=args.input or "-",
        output=args.output,
        rejects=args.rejects,
        state_dir=args.state_dir,
        follow=args.follow,
        http_listen=args.listen,
        state_key=_state_key(),
        reloader=reloader,
        input_format=args.input_format,
    )
    summary = run_embedded(config, opts, stop)
    log.info(summary.describe(), extra={"event": "run_finished", "windows": summary.windows, "flagged": summary.flagged})
    return EXIT_OK


def cmd_replay(args: argparse.Namespace) -> int:
    from service.embedded import replay

    config = load_config(args.config)
    if args.window is not None:
        try:
            config = _override_window(config, parse_duration(args.window))
        except ValueError as exc:
            raise ConfigError(f"--window: {exc}") from exc
    labels = None
    if args.labels is not None:
        from service.labels import read_labels

        try:
            labels = read_labels(args.labels)  # a bad labels file fails before a long replay
        except TidewatchError as exc:
            raise ConfigError(f"--labels: {exc}") from exc
    if args.report is not None and args.output == "-":
        raise ConfigError("--report reads the scores back: give --output a file, not -")
    from service.progress import Progress

    summary = replay(config, args.input, args.output, args.rejects, progress=Progress.for_input(args.input),
                     input_format=args.input_format)
    print(summary.describe(), file=sys.stderr)
    if args.report is not None:
        from service.report import write_report

        write_report(args.report, args.output, input_path=args.input, labels=labels,
                     progress=Progress.for_input(args.input, label="report"))
        print(f"report -> {args.report}", file=sys.stderr)
    return EXIT_OK


def cmd_demo(args: argparse.Namespace) -> int:
    from service.demo import run_demo

    return run_demo(seed=args.seed, days=args.days, out_dir=args.out_dir, config_path=args.config)


def cmd_check_config(args: argparse.Namespace) -> int:
    config = load_config(args.file)
    print(f"{args.file}: ok ({len(config.rules)} rule(s))")
    for service in args.services:
        print(f"{service}: {config.settings_for(service).describe()}")
    return EXIT_OK


def cmd_notify(args: argparse.Namespace) -> int:
    from service.subscriber import run_args

    stop = threading.Event()
    _install_stop_handlers(stop)
    return run_args(args, stop)


def cmd_config_schema(args: argparse.Namespace) -> int:
    import json

    from service.config import config_json_schema

    print(json.dumps(config_json_schema(), indent=2, sort_keys=True))
    return EXIT_OK


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="tidewatch",
        description="Score every time window of every service's metrics for how unusual it is.",
        epilog=EPILOG,
    )
    p.add_argument("--log-level", default=None, help="debug, info, warning or error (default: $TIDEWATCH_LOG_LEVEL or info)")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")

    r = sub.add_parser("run", help="score a live stream until stopped", epilog=EPILOG,
                       description="Score a live stream. With a [kafka] table in the config and no --input, it consumes the "
                       "input topics with exactly-once output; otherwise it reads JSON lines from --input, saves learned "
                       "state and positions to the state directory and restores them on the next start.")
    r.add_argument("--config", help="config file (TOML); built-in defaults when omitted")
    r.add_argument("--input", default=None,
                   help="input JSON lines: a file, or - for stdin (the default, unless the config has a [kafka] table)")
    r.add_argument("--output", default="-", help="score messages as JSON lines: a file, or - for stdout (default)")
    r.add_argument("--rejects", default=None, help="rejected messages with their reasons: a file, or - for stdout")
    r.add_argument("--state-dir", default=None, help="state directory (default: the config's state.dir)")
    r.add_argument("--follow", action="store_true", help="at the end of the input file, wait for more lines")
    r.add_argument("--input-format", choices=("native", "otlp_json"), default="native", help="native (default) or otlp_json: one OpenTelemetry ExportMetricsServiceRequest (OTLP/JSON) per line")
    r.add_argument("--listen", default=None, help="host:port for /metrics, /healthz, /readyz; '' turns it off")
    r.add_argument("--no-supervise", action="store_true",
                   help="Kafka: run the worker in this process instead of under a restarting parent")
    r.set_defaults(func=cmd_run)

    rp = sub.add_parser("replay", help="score a recorded file as fast as possible", epilog=EPILOG,
                        description="Score a recorded file of JSON lines from fresh models and flush every window at the end.")
    rp.add_argument("input", metavar="INPUT", help="recorded JSON lines, or - for stdin")
    rp.add_argument("--output", required=True, metavar="SCORES", help="score messages as JSON lines (- for stdout)")
    rp.add_argument("--window", default=None, metavar="DURATION", help="window length for every service, e.g. 5m")
    rp.add_argument("--input-format", choices=("native", "otlp_json"), default="native", help="native (default) or otlp_json: one OpenTelemetry ExportMetricsServiceRequest (OTLP/JSON) per line")
    rp.add_argument("--config", default=None, help="config file (TOML)")
    rp.add_argument("--rejects", default=None, help="where rejected lines go, with their reasons")
    rp.add_argument("--report", default=None, metavar="HTML", help="write a self-contained HTML backtest report")
    rp.add_argument("--labels", default=None, metavar="CSV",
                    help="labelled incidents (service,start,end[,metric,kind,note]) drawn and scored in the report")
    rp.set_defaults(func=cmd_replay)

    d = sub.add_parser("demo", help="generate the demo scenario, score it, and report what was caught", epilog=EPILOG)
    d.add_argument("--seed", type=int, default=7, help="scenario seed (default 7)")
    d.add_argument("--days", type=float, default=7.0, help="simulated days (default 7)")
    d.add_argument("--out-dir", default="demo-output", help="where the scenario, scores and rejects are written")
    d.add_argument("--config", default=None, help="config file (default: the demo's own settings)")
    d.set_defaults(func=cmd_demo)

    c = sub.add_parser("check-config", help="validate a config file and show the rule each service gets", epilog=EPILOG)
    c.add_argument("file", metavar="FILE")
    c.add_argument("services", nargs="*", metavar="SERVICE")
    c.set_defaults(func=cmd_check_config)

    from service.subscriber import add_arguments as notify_arguments

    n = sub.add_parser("notify", help="turn score messages into webhook alert notifications (onset and resolve)",
                       epilog=EPILOG, description="An example score-topic subscriber: one notification per service per "
                       "alert onset, one resolve message when it clears.")
    notify_arguments(n)
    n.set_defaults(func=cmd_notify)

    s = sub.add_parser("config-schema", help="print the JSON Schema of the config file", epilog=EPILOG)
    s.set_defaults(func=cmd_config_schema)
    return p


def _reported(exc: BaseException, args: argparse.Namespace) -> str:
    """The error's text with secret setting values (a SASL password echoed by a config error) masked."""
    from service.redact import redact, secret_values

    return redact(str(exc), secret_values(config_path=getattr(args, "config", None) or getattr(args, "file", None)))


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    configure_logging(args.log_level)
    try:
        return args.func(args)
    except ConfigError as exc:
        print(f"tidewatch: {_reported(exc, args)}", file=sys.stderr)
        return EXIT_USAGE
    except BusFatalError as exc:
        log.critical(_reported(exc, args), extra={"event": "bus_fatal"})
        return EXIT_BUS_FATAL
    except TidewatchError as exc:
        # OutputError (an output refused a write) and StateStoreError (the last checkpoint failed) land
        # here: exit 1, and the next start resumes from the last checkpoint.
        log.error(_reported(exc, args), extra={"event": "failed"})
        return EXIT_FAILURE
    except OSError as exc:
        log.error(_reported(exc, args), extra={"event": "failed"})
        return EXIT_FAILURE
    except KeyboardInterrupt:
        return EXIT_INTERRUPTED


if __name__ == "__main__":
    sys.exit(main())
