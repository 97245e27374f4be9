"""Command line: argument parsing only. Every command calls one public function of the package.

Importing this module is light (no numpy, pyarrow or faiss): each command imports what it needs
when it runs, inside :func:`main`'s handling of Ctrl-C.

Options of ``mine``, ``score`` and ``sweep`` are generated from the config dataclasses
(:mod:`tripletkit.config`), so every config key has the option of the same name and the two
cannot drift apart. A command-line option overrides the config file.
"""

from __future__ import annotations

import argparse
import contextlib
import dataclasses
import json
import math
import os
import re
import signal
import sys
import typing
import warnings

from . import __version__
from ._errors import INTERRUPTED, TripletkitError
from ._io import jsonable
from .config import ComputeConfig, EvaluationConfig, MiningConfig, unwrap_optional

__all__ = ["main", "build_parser"]


def _table_options(p):
    g = p.add_argument_group("table columns")
    g.add_argument("--id-column", default="id", help="column of row ids (default: id)")
    g.add_argument("--label-column", default="label", help="column of identity labels (default: label)")
    g.add_argument("--embedding-column", default="embedding", help="column of vectors (default: embedding)")
    g.add_argument("--group-column", default="group", help="optional column of subgroups (default: group)")
    g.add_argument("--drop-invalid", action="store_true",
                   help="drop rows with NaN/Inf or zero norm instead of failing (the count is reported)")


def _table_kwargs(args):
    return {"id_column": args.id_column, "label_column": args.label_column,
            "embedding_column": args.embedding_column, "group_column": args.group_column,
            "drop_invalid": args.drop_invalid}


def _config_options(p, cls, title, skip=()):
    """Add one option per field of config dataclass ``cls``; defaults stay None (= use config)."""
    g = p.add_argument_group(title)
    hints = typing.get_type_hints(cls)
    for f in dataclasses.fields(cls):
        if f.name in skip:
            continue
        tp, _ = unwrap_optional(hints[f.name])
        flag = "--" + f.name.replace("_", "-")
        default = f.default if f.default is not dataclasses.MISSING else None
        choices = f.metadata.get("choices") or f.metadata.get("each")
        # one default per option; the choices, where there are any, in the help and the usage
        help_text = f.metadata.get("help", "")
        if choices:
            help_text += f"; one of {', '.join(choices)}"
        help_text = f"{help_text} (default: {_show(default)})".replace("%", "%%")
        dest = f"cfg_{cls.__name__}_{f.name}"
        if tp is bool:
            g.add_argument(flag, dest=dest, action=argparse.BooleanOptionalAction, default=None, help=help_text)
        elif typing.get_origin(tp) is tuple:
            elem = typing.get_args(tp)[0]
            if dataclasses.is_dataclass(elem):
                continue
            g.add_argument(flag, dest=dest, nargs="+", type=_scalar_type(elem), default=None, choices=choices,
                           metavar=None if choices else "V", help=help_text)
        else:
            g.add_argument(flag, dest=dest, type=_scalar_type(tp), default=None, choices=choices,
                           metavar=None if choices else _metavar(tp), help=help_text)


def _scalar_type(tp):
    if tp is float:
        return _float
    return tp


def _float(text):
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number, got {text!r}") from None
    if not math.isfinite(value):
        raise argparse.ArgumentTypeError(f"expected a finite number, got {text!r}")
    return value


def _metavar(tp):
    return {float: "X", int: "N", str: "S"}.get(tp, "V")


def _show(value):
    if isinstance(value, tuple):
        return " ".join(map(str, value))
    return "none" if value is None else str(value)


def _overrides(args, cls):
    prefix = f"cfg_{cls.__name__}_"
    return {k[len(prefix):]: v for k, v in vars(args).items() if k.startswith(prefix) and v is not None}


class _Parser(argparse.ArgumentParser):
    """argparse with one-line errors (exit code 2), like every other bad input."""

    def error(self, message):
        self.exit(2, f"error: {self.prog}: {message} (see '{self.prog} --help')\n")


def build_parser():
    """The argument parser of the ``tripletkit`` command."""
    parser = _Parser(
        prog="tripletkit",
        description="Mine triplets, score checkpoints and choose the margin of identity-embedding models.",
    )
    parser.add_argument("--version", action="version", version=f"tripletkit {__version__}")
    parser.add_argument("--debug", action="store_true", help="show a traceback on errors")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True

    p = sub.add_parser("check", help="describe and validate an embedding table")
    p.add_argument("table", help="Parquet file or folder of Parquet files")
    _table_options(p)
    p.add_argument("--json", action="store_true", help="print a JSON object")

    p = sub.add_parser("loss", help="score a triplet table against an embedding table")
    p.add_argument("triplets", help="Parquet triplet table (anchor, positive, negative ids)")
    p.add_argument("table", help="embedding table the ids refer to")
    p.add_argument("--margin", type=_float, default=0.2, help="margin alpha (default: 0.2)")
    p.add_argument("--distance", choices=("squared", "euclidean"), default="squared",
                   help="distance on unit vectors (default: squared)")
    p.add_argument("--soft", action="store_true", help="soft-margin loss log(1 + exp(d_ap - d_an))")
    _table_options(p)
    p.add_argument("--json", action="store_true", help="print a JSON object")

    p = sub.add_parser("mine", help="choose easy, semi-hard and hard triplets for the next epoch")
    p.add_argument("table", help="Parquet dump of the current training embeddings")
    p.add_argument("--out", required=True, help="triplet table to write (Parquet)")
    p.add_argument("--config", help="TOML config; its [mining] section sets the defaults")
    _config_options(p, MiningConfig, "mining options (also keys of [mining])")
    _config_options(p, ComputeConfig, "compute options (also keys of [compute])")
    _table_options(p)
    _run_options(p)

    p = sub.add_parser("score", help="score a checkpoint's embeddings of held-out identities")
    p.add_argument("table", help="Parquet table of held-out embeddings")
    p.add_argument("--out", required=True, help="report folder to write")
    p.add_argument("--config", help="TOML config; its [evaluation] section sets the defaults")
    _config_options(p, EvaluationConfig, "evaluation options (also keys of [evaluation])")
    _config_options(p, ComputeConfig, "compute options (also keys of [compute])")
    _table_options(p)
    _run_options(p)

    p = sub.add_parser("sweep", help="compare margins side by side, from a config file")
    p.add_argument("config", help="TOML config with a [sweep] section")
    p.add_argument("--out", required=True, help="sweep folder to write")
    _run_options(p)

    p = sub.add_parser("demo", help="run the loop on the bundled seal-survey demo data")
    p.add_argument("--out", default="tripletkit-demo", help="folder to write into (default: tripletkit-demo)")
    p.add_argument("--force", action="store_true", help="replace an existing output folder")
    p.add_argument("--quiet", action="store_true", help="no progress output")
    return parser


def _run_options(p):
    p.add_argument("--force", action="store_true", help="replace existing outputs")
    p.add_argument("--quiet", action="store_true", help="no progress output on stderr")
    p.add_argument("--json", action="store_true", help="print the summary as a JSON object")


def _load_section(args, name, cls):
    from .config import load_config, override

    section = getattr(load_config(args.config), name) if args.config else cls()
    return override(section, **_overrides(args, cls))


def _compute(args):
    from .config import load_config, override

    section = load_config(args.config).compute if getattr(args, "config", None) else ComputeConfig()
    return override(section, **_overrides(args, ComputeConfig))


def _run(args):
    """Dispatch one parsed command; return the object to print."""
    if args.command == "check":
        from .tables.check import check

        return check(args.table, **_table_kwargs(args))
    if args.command == "loss":
        from .triplet_scores import loss

        return loss(args.triplets, args.table, margin=args.margin, distance=args.distance,
                                   soft=args.soft, table_options=_table_kwargs(args))
    if args.command == "mine":
        from .mining import mine

        compute = _compute(args)
        return mine(args.table, out=args.out, config=_load_section(args, "mining", MiningConfig), force=args.force,
                    quiet=args.quiet, table_options=_table_kwargs(args), strict=True, config_file=args.config,
                    compute=compute if compute.scheduler is not None else None)
    if args.command == "score":
        from .evaluate import score

        compute = _compute(args)
        return score(args.table, out=args.out, config=_load_section(args, "evaluation", EvaluationConfig),
                     force=args.force, quiet=args.quiet, table_options=_table_kwargs(args), strict=True,
                     config_file=args.config, compute=compute if compute.scheduler is not None else None)
    if args.command == "sweep":
        from .sweeps import sweep

        return sweep(args.config, out=args.out, force=args.force, quiet=args.quiet)
    if args.command == "demo":
        from .scenario import demo

        return demo(args.out, force=args.force, quiet=args.quiet)
    raise AssertionError(args.command)  # argparse guarantees a known command



def _flags_of(parser):
    """Python parameter name -> command-line flag, over every command's options."""
    flags = {}
    subparsers = [a for a in parser._actions if isinstance(a, argparse._SubParsersAction)]
    for sub in subparsers[0].choices.values() if subparsers else ():
        for action in sub._actions:
            longs = [o for o in action.option_strings if o.startswith("--") and not o.startswith("--no-")]
            if longs:
                flags[longs[0][2:].replace("-", "_")] = (longs[0], action)
    return flags


def as_flags(message, parser):
    """A message written for Python callers (``drop_invalid=True``, ``memory_mb=...``), with each
    known parameter spelt as the command's flag (``--drop-invalid``, ``--memory-mb ...``)."""
    flags = _flags_of(parser)

    def flag(match):
        name, value = match.group(1), match.group(2)
        if name not in flags:
            return match.group(0)
        option, action = flags[name]
        if re.fullmatch(r"'[A-Za-z][\w-]*'", value):
            value = value[1:-1]  # a word: --index exact, not --index 'exact'; paths keep their quotes
        if value in ("True", "False") and action.nargs == 0 or isinstance(action, argparse.BooleanOptionalAction):
            return option if value != "False" else "--no-" + option[2:]
        return option if value in ("...", "") else f"{option} {value}"

    return re.sub(r"\b([a-z][a-z0-9_]*)=(True|False|\.\.\.|'[^']*'|[^\s,;)]*)", flag, message)


def _text(obj, indent=0):
    lines = []
    pad = "  " * indent
    for key, value in obj.items():
        if isinstance(value, dict):
            lines.append(f"{pad}{key}:")
            lines.extend(_text(value, indent + 1))
        elif isinstance(value, list) and (len(value) > 12 or any(isinstance(v, (dict, list)) for v in value)):
            # long lists and lists of records (a sweep's runs) are for --json, not for a summary
            lines.append(f"{pad}{key}: [{len(value)} {'entries' if any(isinstance(v, dict) for v in value) else 'values'}]")
        elif isinstance(value, float):
            lines.append(f"{pad}{key}: {value:.6g}")
        else:
            lines.append(f"{pad}{key}: {value}")
    return lines


class _Terminated(SystemExit):
    """SIGTERM as an exception: atomic outputs clean up their temporary files on the way out."""


def _on_sigterm(signum, frame):
    raise _Terminated(128 + signum)


def _one_line(text):
    lines = str(text).strip().splitlines()
    return lines[0] if lines else ""


def _show_warning(message, category, filename, lineno, file=None, line=None):
    """Warnings as one line each (``warning: ...``) instead of Python's two-line format."""
    from ._errors import TripletkitWarning

    text = _one_line(message)
    if not issubclass(category, TripletkitWarning):
        text = f"{category.__name__}: {text}"
    try:
        print(f"warning: {text}", file=sys.stderr if file is None else file, flush=True)
    except (OSError, ValueError):
        pass


def _memory_message(command):
    hint = {"mine": "lower --memory-mb or --block-rows, use --index ivf or hnsw, or mine a smaller table",
            "score": "lower --memory-mb or --block-rows, or score fewer rows or a lower embedding dimension",
            "sweep": "use fewer held-out rows or a smaller [head] dim"}.get(command, "use a smaller input")
    return f"out of memory while running {command}; {hint}"


def main(argv=None):
    """Entry point of the ``tripletkit`` command; returns the exit code.

    Exit codes: 0 done; 2 bad input (one line ``error: ...`` on stderr, also for running out of
    memory or an operating-system error such as a full disk); 1 ``check`` found problems (one line
    ``problem: ...`` each after the summary) or an internal error (a bug: the line says so,
    ``--debug`` shows the traceback); 130 interrupted (Ctrl-C), 143 terminated (SIGTERM).
    Warnings print as one line each, ``warning: ...``.
    """
    parser = build_parser()
    args = parser.parse_args(argv)
    previous = signal.signal(signal.SIGTERM, _on_sigterm)
    try:
        with warnings.catch_warnings():
            if not args.debug:
                warnings.showwarning = _show_warning
            result = jsonable(_run(args))
    except TripletkitError as exc:
        if args.debug:
            raise
        print(f"error: {as_flags(_one_line(exc), parser)}", file=sys.stderr)
        return 2
    except MemoryError:
        if args.debug:
            raise
        print(f"error: {_memory_message(args.command)}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        if args.debug:
            raise
        print(INTERRUPTED, file=sys.stderr)
        return 130
    except _Terminated as exc:
        print("terminated: no output was written", file=sys.stderr)
        return exc.code
    except OSError as exc:
        if args.debug:
            raise
        where = f" ({exc.filename})" if getattr(exc, "filename", None) else ""
        print(f"error: {exc.strerror or _one_line(exc) or type(exc).__name__}{where}; check the path, "
              "permissions and free space", file=sys.stderr)
        return 2
    except Exception as exc:  # a bug: say so in one line, the traceback is one --debug away
        if args.debug:
            raise
        print(f"error: internal error ({type(exc).__name__}: {_one_line(exc)}); this is a bug in tripletkit, "
              "rerun with --debug for the traceback and report it", file=sys.stderr)
        return 1
    finally:
        signal.signal(signal.SIGTERM, previous)
    # check reports like a linter: each problem that would make mine or score refuse the table
    # on its own line, and exit code 1
    problems = result.get("problems") if args.command == "check" and isinstance(result, dict) else None
    if problems:
        problems = result["problems"] = [as_flags(_one_line(problem), parser) for problem in problems]
    try:
        if getattr(args, "json", False):
            print(json.dumps(result, indent=2, sort_keys=False))
        elif isinstance(result, dict):
            print("\n".join(_text({k: v for k, v in result.items() if not (problems is not None and k == "problems")})))
            for problem in problems or ():
                print(f"problem: {_one_line(problem)}")
        elif result is not None:
            print(result)
        sys.stdout.flush()
    except BrokenPipeError:
        # the reader (e.g. `| head`) went away; not an error of ours
        with contextlib.suppress(OSError):
            os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
    return 1 if problems else 0


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
