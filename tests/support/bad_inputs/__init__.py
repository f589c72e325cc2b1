"""A catalogue of defective inputs (decisions table, episodes table, protocol, files); see cases.py."""
