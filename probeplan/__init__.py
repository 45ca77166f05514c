"""probeplan: plan and analyse multiplexed in vivo fluorescence imaging with nanocrystal probes.

For research use only. It never replaces the institution's animal care committee,
laser safety officer, radiation/chemical safety office, or local regulations.
"""

from probeplan.errors import InputError, ModelValidityWarning, ProbeplanWarning

__all__ = ["InputError", "ProbeplanWarning", "ModelValidityWarning", "__version__", "RESEARCH_USE_CAUTION", "run_study"]

__version__ = "0.1.0"

#: Shown by every command, report and page.
RESEARCH_USE_CAUTION = (
    "For research use only. probeplan's figures are planning estimates; the institution's animal care "
    "committee, laser safety officer, chemical/radiation safety office and local regulations decide."
)


def __getattr__(name: str):
    # Entry points that pull in pandas/scipy are imported on first use, so `import probeplan` stays light.
    if name == "run_study":
        from probeplan.study.runs import run_study

        return run_study
    raise AttributeError(f"module 'probeplan' has no attribute {name!r}")
