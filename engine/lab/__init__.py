"""The lab folder's transaction: arrival and completeness, claim, outcomes, group commit, recovery."""
