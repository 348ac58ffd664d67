"""The ``goalkit`` command: a thin click group; the logic lives in the library.

Commands are loaded lazily, so ``goalkit --help`` stays fast and a command's heavy imports
(faiss, matplotlib, dask) are paid only when it runs.
"""

from __future__ import annotations

import importlib
import sys

import click

from goalkit import __version__
from goalkit.cli_support import EXIT_INTERRUPTED, forget_caught_interrupt, run_guarded

#: command name -> "module:function" (a click.Command); help text shown in the listing.
COMMANDS = {
    "demo": ("goalkit.demo.command:demo", "Write invented demo logs of the irrigation-gantry bench."),
    "scan": ("goalkit.pipeline.scancommand:scan", "Summarise task logs and check them; propose a layout."),
    "build": ("goalkit.pipeline.command:build", "Build a goal-conditioned dataset from a recipe."),
    "verify": ("goalkit.write.command:verify", "Re-derive a built dataset from its logs and check it."),
    "info": ("goalkit.write.info_command:info", "Print a built dataset's card facts (from the file alone)."),
    "embed": ("goalkit.goals.command:embed", "Fit a goal embedding on task logs and save it."),
    "tune": ("goalkit.thresholds.command:tune", "Choose the goal-match threshold from labels or diagnostics."),
    "suite": ("goalkit.suites.command:suite", "Draw a held-out goal suite from a built set's validation split."),
    "assess": ("goalkit.scoring.command:assess", "Score a policy or value function on a suite, offline."),
}


class LazyGroup(click.Group):
    """A click group whose subcommands are imported on first use."""

    def list_commands(self, ctx):
        return list(COMMANDS)

    def get_command(self, ctx, name):
        if name not in COMMANDS:
            return None
        target, _ = COMMANDS[name]
        module, attr = target.split(":")
        return getattr(importlib.import_module(module), attr)

    def main(self, args=None, prog_name=None, complete_var=None, standalone_mode=True, **extra):
        """click's main, with its usage errors on one line like every other error (exit 2)."""
        if not standalone_mode:
            return super().main(args, prog_name, complete_var, standalone_mode=False, **extra)
        try:
            rv = super().main(args, prog_name, complete_var, standalone_mode=False, **extra)
        except click.exceptions.NoArgsIsHelpError as exc:
            exc.show()  # `goalkit` alone: the help text
            sys.exit(exc.exit_code)
        except click.ClickException as exc:
            ctx = getattr(exc, "ctx", None)
            path = " ".join(["goalkit", *ctx.command_path.split()[1:]]) if ctx is not None else ""
            where = f" ({path} --help lists the options)" if ctx is not None else ""
            click.echo(f"goalkit: error: {' '.join(exc.format_message().split())}{where}", err=True)
            sys.exit(exc.exit_code)
        except click.Abort:  # Ctrl-C before a command started
            click.echo("goalkit: interrupted; nothing was written", err=True)
            forget_caught_interrupt()
            sys.exit(EXIT_INTERRUPTED)
        sys.exit(rv if isinstance(rv, int) else 0)

    def parse_args(self, ctx, args):
        ctx.meta["goalkit.args"] = list(args)  # kept for "run the same command again" advice
        return super().parse_args(ctx, args)

    def invoke(self, ctx):
        """Run the subcommand under the one exit convention (goalkit.cli_support.run_guarded).

        Each command is decorated too; this covers what happens around it (loading the command's
        module, an interruption before the command starts).
        """
        return run_guarded(super().invoke, ctx)

    def format_commands(self, ctx, formatter):
        rows = [(name, help_) for name, (_, help_) in COMMANDS.items()]
        with formatter.section("Commands"):
            formatter.write_dl(rows)


@click.group(cls=LazyGroup, context_settings={"help_option_names": ["-h", "--help"], "show_default": True})
@click.version_option(__version__, prog_name="goalkit")
@click.option("--debug", is_flag=True,
              help="Also print the traceback before an error's one line (the exit status is the same).")
@click.pass_context
def main(ctx, debug):
    """goalkit: turn existing task logs into goal-conditioned training sets.

    Typical flow: scan the logs, write a recipe, build, verify.

    Exit status, every command: 0 success; 1 verify found the set inconsistent; 2 bad input or a
    refused output (one line on stderr); 3 internal error (a bug; rerun with --debug and report
    it); 130 interrupted (Ctrl-C; one line says what was kept); 141 stdout closed by its reader.
    """
    ctx.ensure_object(dict)
    ctx.obj["debug"] = debug


if __name__ == "__main__":  # pragma: no cover
    main()
