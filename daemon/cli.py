"""The `straind` command line."""

from __future__ import annotations

import argparse
import os
import json
import sys
import time
from importlib import resources
from pathlib import Path
from typing import Any, Sequence

from straind import __version__

SAFETY = ("Strain monitoring informs engineers; it does not replace protective devices, "
          "inspection or the judgement of a licensed engineer. Rigs under load, pressure parts "
          "and lifting gear follow local codes and regulations.")

EXIT_CONFIG = 2
EXIT_UNAVAILABLE = 3


def demo_config_text() -> str:
    """The built-in demo configuration (config/demo.yaml, shipped inside the package)."""
    return resources.files("straind").joinpath("demo.yaml").read_text(encoding="utf-8")


def _load(path: str | None) -> Any:
    from straind.config import load_config, load_config_text
    if path is None:
        return load_config_text(demo_config_text(), "built-in demo (config/demo.yaml)", Path.cwd())
    return load_config(path)


def _socket_path(args: argparse.Namespace) -> Path:
    if getattr(args, "socket", None):
        return Path(args.socket)
    cfg = _load(args.config)
    sock = cfg.data["control"]["socket"]
    return cfg.resolve(sock) if sock else cfg.resolve(cfg.storage["path"]) / "straind.sock"


def cmd_run(args: argparse.Namespace) -> int:
    from straind.logs import setup_logging
    from straind.memory import tune_allocator
    from straind.service import run_service
    log = setup_logging(args.log_level)
    if tune_allocator():
        log.debug("allocator: heap top pad kept for block-sized arrays")
    cfg = _load(args.config)
    if args.config is None:
        log.info("no -c given: running the built-in demo (simulated bridge), storage %s",
                 cfg.resolve(cfg.storage["path"]))
    log.info("%s", SAFETY)
    return run_service(cfg, args.duration)


def _fmt(v: float) -> str:
    if v != v:  # NaN
        return "-"
    return f"{v:.6g}"


def _arrangement(ch: dict) -> str:
    """The 'bridge' column of the check table: bridge, quantity or temperature sensor model."""
    if ch["sensor"] == "rtd":
        return f"{ch['element']} {ch['wiring']}"
    if ch["sensor"] == "thermocouple":
        cj = (f"CJ {ch['junction_channel']}" if ch["junction_channel"] is not None
              else f"CJ {ch['junction_c']:g} degC")
        return f"type {ch['type']}, {cj}"
    return ch.get("bridge") or ch.get("quantity", "")


def _print_table(header: Sequence[str], rows: list[Sequence[str]]) -> None:
    widths = [max(len(h), *(len(r[i]) for r in rows)) for i, h in enumerate(header)]
    print("  ".join(h.ljust(w) for h, w in zip(header, widths)))
    for r in rows:
        print("  ".join(c.ljust(w) for c, w in zip(r, widths)))


def cmd_check(args: argparse.Namespace) -> int:
    from straind.chain import DeviceChain
    from straind.config import channel_reference, config_warnings
    from straind.plugins import load_driver
    cfg = _load(args.config)
    print(f"configuration {cfg.source}: valid")
    print(f"station {cfg.station_id}; storage {cfg.resolve(cfg.storage['path'])}")
    header = ("device", "channel", "sensor", "bridge", "GF", "exc V", "gain", "range min",
              "range max", "per code", "unit")
    rows = []
    derived = []
    for dev in cfg.devices:
        cls = load_driver(dev["driver"])
        native = cls.static_info(dev["options"]).native
        chain = DeviceChain(dev, None, native)
        for ch, rng in zip(dev["channels"], chain.range_table()):
            exc = ch.get("excitation_v")
            gain = channel_reference(ch, dev["adc"])[0] if dev.get("adc") else "-"
            rows.append((dev["name"], ch["name"], ch["sensor"], _arrangement(ch),
                         _fmt(ch["gauge_factor"]) if "gauge_factor" in ch else "-",
                         "-" if exc is None else _fmt(exc), str(gain),
                         _fmt(rng["min"]), _fmt(rng["max"]), _fmt(rng["resolution"]),
                         rng["unit"]))
        for lay in chain.channel_layouts():
            if not lay.measured:
                derived.append((dev["name"], lay.name, str(lay.attrs.get("derived_kind", "")),
                                str(lay.attrs.get("inputs", "")).replace(",", ", "), lay.unit))
    _print_table(header, rows)
    print("range: value at the converter's full-scale codes from the current zero (untared "
          "here); per code: change of the value for one code step at zero (temperature "
          "channels: the span the sensor function reaches within the codes, per code at "
          "0 degC; a thermocouple with a junction channel is shown with its junction at 0 degC).")
    if derived:
        print()
        _print_table(("device", "derived column", "kind", "inputs", "unit"), derived)
    alarms = cfg.data.get("alarms") or []
    if alarms:
        print()
        _print_table(("alarm", "channel", "kind", "limit", "hysteresis", "hold s", "severity"),
                     [(a["name"], f"{a['device']}/{a['column']}", a["kind"], _fmt(a["limit"]),
                       _fmt(a["hysteresis"]), _fmt(a["hold_s"]), a["severity"]) for a in alarms])
    for w in config_warnings(cfg.data):
        print(f"warning: {w}")
    return 0


def cmd_drivers(args: argparse.Namespace) -> int:
    from straind.plugins import list_drivers
    listing = list_drivers()
    width = max((len(d.name) for d in listing), default=4)
    for d in listing:
        if d.error is None:
            print(f"{d.name.ljust(width)}  {d.summary}")
        else:
            print(f"{d.name.ljust(width)}  UNAVAILABLE: {d.error}")
    return 0


def _send(args: argparse.Namespace, command: str, cmd_args: dict, timeout_s: float = 60) -> Any:
    from straind.control import send_command
    return send_command(_socket_path(args), command, cmd_args, timeout_s=timeout_s)


def cmd_tare(args: argparse.Namespace) -> int:
    if not args.all and not args.channels:
        print("straind tare: give CHANNEL... (or DEVICE/CHANNEL) or --all", file=sys.stderr)
        return EXIT_CONFIG
    cmd_args: dict[str, Any] = {"seconds": args.seconds}
    if args.all:
        cmd_args["all"] = True
    else:
        cmd_args["channels"] = args.channels
    result = _send(args, "tare", cmd_args, timeout_s=args.seconds * 3 + 30)
    for name, d in sorted(result.items()):
        old = d["old_zero_ratio"]
        old_s = "none" if old is None else f"{old * 1e3:.6f} mV/V"
        print(f"{name}: zero {d['new_zero_ratio'] * 1e3:.6f} mV/V (was {old_s}), "
              f"{d['samples']} samples, calibration version {d['calibration_version']}")
    return 0


def cmd_shunt_cal(args: argparse.Namespace) -> int:
    result = _send(args, "shunt-cal", {"channel": args.channel, "apply": args.apply,
                                       "seconds": args.seconds}, timeout_s=args.seconds * 10 + 30)
    for name, d in result.items():
        flag = "" if d["within_tolerance"] else f"  OUT OF TOLERANCE (+/-{d['tolerance_pct']:g} %)"
        print(f"{name}: shunt {d['shunt_ohm']:g} ohm on arm {d['arm']}: expected "
              f"{d['expected_microstrain']:.3f}, measured {d['measured_microstrain']:.3f} "
              f"microstrain, gain {d['gain']:.6f} ({d['gain_error_pct']:+.3f} %){flag}")
        print(f"  gain correction {'applied' if d['applied'] else 'not applied'}: "
              f"{d['gain_correction']:.6f} (calibration version {d['calibration_version']})")
    return 0


def cmd_mark(args: argparse.Namespace) -> int:
    _send(args, "mark", {"text": " ".join(args.text)})
    print("event mark recorded")
    return 0


def _print_status(st: dict) -> None:
    print(f"station {st['station']}  straind {st['version']}  pid {st['pid']}  "
          f"up {st['uptime_s']:.0f} s  config {st['config']}")
    store = st.get("storage") or {}
    if store:
        print(f"storage: segment {store.get('segment_path')}  queue {store.get('queue_blocks')} "
              f"blocks  dropped {store.get('dropped_blocks')}  write errors "
              f"{store.get('write_errors')}")
    feed = st.get("feed")
    if feed:
        print(f"feed: {feed.get('broker', feed)}")
    for name, d in st["devices"].items():
        print(f"device {name} ({d['driver']}): {d['state']}, {d['measured_rate_hz']:.1f} of "
              f"{d['sample_rate_hz']:g} S/s, {d['samples']} samples, reconnects {d['reconnects']}"
              + (f", last error: {d['last_error']}" if d["last_error"] else ""))
        values = d.get("last_values") or {}
        width = max([16] + [len(c) for c in d["units"]])
        for ch, unit in d["units"].items():
            v = values.get(ch)
            z = d["zeros"].get(ch)
            if z is None:
                zs = ""  # temperature channel or derived column: no zero of its own
            elif z.get("taken_ns"):
                tz = time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(z["taken_ns"] / 1e9))
                zs = f"zero {tz} ({z['origin']}, cal v{z['calibration_version']})"
            else:
                zs = "no zero taken"
            vs = "-" if v is None else f"{v:.4f}"
            print(f"  {ch:<{width}} {vs:>14} {unit:<13} {zs}".rstrip())
    for alarm in st.get("alarms", []) or []:
        if not isinstance(alarm, dict):
            print(f"ALARM {alarm}")
            continue
        since = time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(alarm["raised_ns"] / 1e9))
        print(f"ALARM {alarm['severity'].upper()} {alarm['name']}: {alarm['device']}/"
              f"{alarm['channel']} {alarm['kind']} {alarm['value']:.6g} {alarm['unit']} "
              f"(limit {alarm['limit']:g}) since {since}")
    _print_faults(st)


def _print_faults(st: dict) -> None:
    """Service faults (storage, disk space, clock, stuck or reconnecting devices) and counts."""
    for fault in st.get("faults") or []:
        since = (time.strftime(" since %Y-%m-%dT%H:%M:%SZ", time.gmtime(fault["since_ns"] / 1e9))
                 if fault.get("since_ns") else "")
        who = f" {fault['device']}" if fault.get("device") else ""
        print(f"FAULT {fault['kind']}{who}: {fault.get('detail', '')}{since}")
    counters = st.get("counters") or {}
    events = counters.get("events") or {}
    if events:
        held = counters.get("log_lines_suppressed", 0)
        print("events: " + ", ".join(f"{k} {v}" for k, v in sorted(events.items()))
              + f"; log lines held back by the rate limit: {held}")


def cmd_status(args: argparse.Namespace) -> int:
    st = _send(args, "status", {}, timeout_s=10)
    if args.json:
        print(json.dumps(st, indent=1, default=str))
    else:
        _print_status(st)
    return 0


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="straind",
        description="Unattended acquisition service for strain-gauge bridges: drivers, exact "
                    "bridge conversion, tare, HDF5 storage, MQTT feed.",
        epilog=SAFETY)
    p.add_argument("--version", action="version", version=f"straind {__version__}")
    sub = p.add_subparsers(dest="command", required=True, metavar="COMMAND")

    def cfg_arg(sp: argparse.ArgumentParser) -> None:
        sp.add_argument("-c", "--config", metavar="FILE",
                        help="configuration file (YAML); default: the built-in demo")

    def sock_arg(sp: argparse.ArgumentParser) -> None:
        cfg_arg(sp)
        sp.add_argument("--socket", metavar="PATH",
                        help="control socket of the running service (default: from the config)")

    sp = sub.add_parser("run", help="run the service; no -c runs the built-in demo")
    cfg_arg(sp)
    sp.add_argument("--duration", type=float, metavar="SECONDS",
                    help="stop after this many seconds (default: run until SIGTERM/SIGINT)")
    sp.add_argument("--log-level", default="info",
                    choices=("debug", "info", "warning", "error"))
    sp.set_defaults(func=cmd_run)

    sp = sub.add_parser("check", help="validate a configuration and print the channel table")
    cfg_arg(sp)
    sp.set_defaults(func=cmd_check)

    sp = sub.add_parser("drivers", help="list installed driver plugins")
    sp.set_defaults(func=cmd_drivers)

    sp = sub.add_parser("tare", help="ask the running service to take a new zero")
    sp.add_argument("channels", nargs="*", metavar="CHANNEL", help="CHANNEL or DEVICE/CHANNEL")
    sp.add_argument("--all", action="store_true", help="every channel of every device")
    sp.add_argument("--seconds", type=float, default=1.0,
                    help="averaging time of the zero in seconds (default 1)")
    sock_arg(sp)
    sp.set_defaults(func=cmd_tare)

    sp = sub.add_parser("status", help="ask the running service how it is")
    sp.add_argument("--json", action="store_true", help="print the full status as JSON")
    sock_arg(sp)
    sp.set_defaults(func=cmd_status)

    sp = sub.add_parser("shunt-cal", help="shunt-calibrate a channel: switch the shunt, "
                        "compare the step with the exact bridge equation")
    sp.add_argument("channel", metavar="CHANNEL", help="CHANNEL or DEVICE/CHANNEL")
    sp.add_argument("--apply", action="store_true",
                    help="apply the measured gain correction (default: only record it)")
    sp.add_argument("--seconds", type=float, default=1.0,
                    help="averaging time with the shunt off and on, each (default 1)")
    sock_arg(sp)
    sp.set_defaults(func=cmd_shunt_cal)

    sp = sub.add_parser("mark", help="record an event mark (a note in the events table)")
    sp.add_argument("text", nargs="+")
    sock_arg(sp)
    sp.set_defaults(func=cmd_mark)
    return p


def main(argv: Sequence[str] | None = None) -> int:
    from straind.control import CommandError, ControlUnavailable
    from straind.drivers.base import DriverError
    from straind.schema import ConfigError
    from straind.state import StateError
    args = build_parser().parse_args(argv)
    try:
        return int(args.func(args) or 0)
    except ConfigError as exc:
        print(f"straind: configuration error: {exc}", file=sys.stderr)
        return EXIT_CONFIG
    except (ControlUnavailable, CommandError) as exc:
        print(f"straind {args.command}: {exc}", file=sys.stderr)
        return EXIT_UNAVAILABLE
    except (StateError, DriverError) as exc:
        print(f"straind: {exc}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        return 130
    except BrokenPipeError:  # output piped into `head` and the like
        try:
            sys.stdout = open(os.devnull, "w")
        except OSError:
            pass
        return 0


if __name__ == "__main__":
    sys.exit(main())
