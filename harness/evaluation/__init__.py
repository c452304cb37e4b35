"""Evaluation stage: threshold policies, window metrics, alarms matched to incidents, intervals."""
