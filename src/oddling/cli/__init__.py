"""The `oddling` command: parse options, call the API, print. No business logic here.

Commands live in modules by area; this module builds the group from them.
"""
from __future__ import annotations

import click

from oddling import __version__
from oddling.cli import analysis, backbones, demo, upkeep
from oddling.cli import service


@click.group(context_settings={"help_option_names": ["-h", "--help"], "show_default": True})
@click.version_option(__version__, prog_name="oddling")
def main():
    """Find the odd ones out in image collections.

    Fit a bank from a folder of normal images, then score new folders against it.
    Higher scores are more anomalous.
    """




for command in (analysis.fit, analysis.score, analysis.evaluate, analysis.report, analysis.tune, demo.demo, demo.bench,
                upkeep.drift, upkeep.audit, upkeep.bank_group, backbones.backbones):
    main.add_command(command)
for command in (service.serve, service.watch, service.log_group):
    main.add_command(command)


if __name__ == "__main__":  # pragma: no cover
    main()
