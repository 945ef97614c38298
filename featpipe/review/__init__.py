"""Review: what changed in meaning since a git revision, and which fits went stale."""
