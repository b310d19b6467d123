"""The ``fleetsim`` command group: every command, and usage errors as ``error:`` lines.

Every expected failure is a FleetsimError: printed as ``error: <message>`` (one line per
problem) with exit status 2, never a traceback. The commands live in one module per family
(:mod:`.run`, :mod:`.report`, :mod:`.study`) and are added to :data:`app` here.
"""

from __future__ import annotations

import sys
from typing import Any

import typer
from typer.core import TyperGroup

from . import fit, impact, report, run, study, telemetry
from .console import OptionValueError, one_line

try:  # typer vendors its own copy of click from 0.22 on
    from typer._click import exceptions as _usage
except ImportError:  # pragma: no cover - older typer on click
    import click.exceptions as _usage  # type: ignore[no-redef]

__all__ = ["app", "main"]


def _usage_line(exc: Exception) -> str:
    """One ``error:`` line for a command-line usage error: the option, what was wrong, the value."""
    if isinstance(exc, _usage.NoSuchOption):
        near = f"; did you mean {', '.join(sorted(exc.possibilities))}?" if exc.possibilities else ""
        return f"{exc.option_name}: unknown option{near} (see --help)"
    if isinstance(exc, _usage.BadParameter):
        param = exc.param
        hint = exc.param_hint or (param.opts[0] if param is not None and getattr(param, "opts", None) else None)
        hint = hint or (getattr(param, "human_readable_name", None) or "option")
        if isinstance(hint, (list, tuple)):
            hint = " / ".join(hint)
        hint = str(hint).strip('"\'')
        if isinstance(exc, _usage.MissingParameter):
            return f"{hint}: missing; see --help"
        if isinstance(exc, OptionValueError):
            return f"{hint}: {exc.message}"
        cause: Any = exc.__cause__
        errors = cause.errors() if hasattr(cause, "errors") else []
        if errors:
            kind = "a whole number" if "integer" in errors[0]["msg"] else "a number"
            return f"{hint}: expected {kind} (got {errors[0]['input']!r})"
        return f"{hint}: {exc.format_message()}"
    if isinstance(exc, _usage.BadOptionUsage):
        return f"{exc.option_name}: {exc.format_message()}"
    return str(getattr(exc, "format_message", exc.__str__)())


class _Commands(TyperGroup):
    """The command group: usage errors are ``error:`` lines with exit status 2, like file errors."""

    def main(self, args: Any = None, prog_name: str | None = None, complete_var: str | None = None,  # type: ignore[override]
             standalone_mode: bool = True, **extra: Any) -> Any:
        try:
            code = super().main(args=args, prog_name=prog_name, complete_var=complete_var,
                                standalone_mode=False, **extra)
            code = code if isinstance(code, int) else 0
        except _usage.NoArgsIsHelpError as exc:
            typer.echo(exc.format_message())
            code = 0
        except _usage.UsageError as exc:
            typer.echo(f"error: {one_line(_usage_line(exc))}", err=True)
            code = 2
        except _usage.ClickException as exc:
            typer.echo(f"error: {one_line(exc.format_message())}", err=True)
            code = exc.exit_code
        except typer.Abort:
            typer.echo("Aborted!", err=True)
            code = 1
        if standalone_mode:
            sys.exit(code)
        return code


app = typer.Typer(
    cls=_Commands,
    name="fleetsim",
    help="Simulate a device fleet taking part in Federated Averaging rounds.",
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
    rich_markup_mode=None,  # plain help text: the terminal library would double the start-up time of --help
)

# The order here is the order --help lists them in.
app.command("run")(run.run)
app.command("check")(run.check)
app.command("schema")(run.schema)
app.command("policies")(run.policies)
app.command("report")(report.report)
app.command("impact")(impact.impact)
app.command("sweep")(study.sweep)
app.command("compare")(study.compare)
app.command("telemetry")(telemetry.telemetry)
app.command("fit")(fit.fit)


def main() -> None:
    """The console entry point (``fleetsim``)."""
    app()


if __name__ == "__main__":
    main()
