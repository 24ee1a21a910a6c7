"""The caution that goes with every diagnosis ballpass gives.

One text, used by the terminal report, every alert message and the alert
engine, so that no channel says less than another.
"""

__all__ = ["CAUTION"]

CAUTION = ("Automated screening result, not a diagnosis: a qualified vibration analyst "
           "should confirm it before any action is taken. Follow lock-out/tag-out and "
           "guarding rules before anyone works on the machine. Local codes and licensed "
           "practice take precedence.")
