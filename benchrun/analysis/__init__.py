"""Pure analysis of double-pulse captures: conditioning → event location → metrics.

Public API::

    from benchrun.analysis import analyze_recovery, RecoveryOptions, RecoveryMetrics
    from benchrun.analysis import analyze_channels, ChannelData, ProbeCalibration, ShotAnalysis
"""

from benchrun.analysis.pipeline import (
    ChannelData,
    ProbeCalibration,
    ShotAnalysis,
    analyze_channels,
)
from benchrun.analysis.recovery import RecoveryMetrics, RecoveryOptions, analyze_recovery

__all__ = [
    "ChannelData",
    "ProbeCalibration",
    "RecoveryMetrics",
    "RecoveryOptions",
    "ShotAnalysis",
    "analyze_channels",
    "analyze_recovery",
]
