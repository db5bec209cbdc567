"""Plumbing shared by every stage (checks, files, tables, memory, transforms, figures).

Not public API: the public packages import from here; nothing here imports them.
"""
