"""One default probe concentration for the library, the command line, the plan and the page."""

from __future__ import annotations

import argparse
import inspect
import sys
from pathlib import Path

from probeplan.cli.model_options import add_target_options
from probeplan.design.search import design
from probeplan.model.channels import channel_report
from probeplan.model.fluorescence import DEFAULT_CONCENTRATION_UM, depth_profile, probe_rate_e_per_s
from probeplan.study.plan import SCHEMA


def test_every_default_is_the_one_constant():
    for fn in (probe_rate_e_per_s, depth_profile, channel_report, design):
        assert inspect.signature(fn).parameters["concentration_uM"].default == DEFAULT_CONCENTRATION_UM, fn.__name__
    parser = argparse.ArgumentParser()
    add_target_options(parser)
    assert parser.parse_args([]).concentration_uM == DEFAULT_CONCENTRATION_UM
    assert SCHEMA["target"][0]["concentration_uM"].default == DEFAULT_CONCENTRATION_UM
    sys.path.insert(0, str(Path(__file__).resolve().parents[1]))
    try:
        from app import page_setup
    finally:
        sys.path.pop(0)
    assert page_setup.DEFAULTS["w_concentration"] == DEFAULT_CONCENTRATION_UM
