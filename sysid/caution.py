"""The caution every stimulation plan, schedule and report of stimsteer carries."""

__all__ = ["CAUTION"]

CAUTION = (
    "Caution: stimsteer is research software, not a medical device. Stimulation of people follows the approved "
    "protocol, local regulations and licensed clinical practice."
)
