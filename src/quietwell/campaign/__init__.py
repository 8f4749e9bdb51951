"""Campaigns: a setup-independent measurement programme, checked before anything
moves, run step by step with a ledger, and resumed after a crash.

``load_campaign`` / ``check_campaign`` read and validate a campaign file on a setup;
``run_campaign`` runs it into a data directory and ``resume_campaign`` continues the
interrupted one there; ``campaign_plan`` is the same as one bluesky plan (for the queue
server). See the README for the file format.
"""

from ._file import (
    SETUP_VALUES,
    Campaign,
    CampaignStep,
    CheckedCampaign,
    Ref,
    check_campaign,
    load_campaign,
    parse_campaign,
    resolve_params,
)
from ._ledger import Ledger, campaign_dirs, read_ledger
from ._progress import Progress
from ._runner import (
    CAUTIONS,
    CampaignInterrupted,
    CampaignOutcome,
    MonitorStopped,
    ParticleLost,
    campaign_plan,
    find_resumable,
    resume_campaign,
    run_campaign,
)

__all__ = [
    "CAUTIONS", "SETUP_VALUES", "Campaign", "CampaignInterrupted", "CampaignOutcome",
    "CampaignStep", "CheckedCampaign", "Ledger", "MonitorStopped", "ParticleLost", "Progress",
    "Ref", "campaign_dirs", "campaign_plan",
    "check_campaign", "find_resumable", "load_campaign", "parse_campaign", "read_ledger",
    "resolve_params", "resume_campaign", "run_campaign",
]
