"""Maintenance and reports: the audit report, the plot pieces the report and the board
share, and the one caution text. Builds on everything below it except ``rig``."""
