"""``gasgap replay`` moved to ``monitor.cli.replay``; this name is kept for imports."""

from monitor.cli.replay import add_replay_command, flag_table, run_replay, summary_text

__all__ = ["add_replay_command", "flag_table", "run_replay", "summary_text"]
