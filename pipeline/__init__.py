"""lesion-growth: lesion volumes, lesion tracks and growth-law fits from longitudinal masks.

Research use only. Not a medical device and not intended for diagnosis, treatment or clinical
decision-making; any clinical decision rests with licensed clinicians under local rules.
"""
from importlib.metadata import PackageNotFoundError, version as _version

try:
    __version__ = _version("lesion-growth")
except PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0+unknown"

DISCLAIMER = (
    "Research use only. Not a medical device and not intended for diagnosis, treatment or "
    "clinical decision-making. Results must be reviewed by qualified, licensed clinicians; any "
    "clinical decision rests with them under local rules and approvals."
)
