"""What each command does with files: check, start, plan, replay, review, demo."""
