"""Figures of stimsteer, drawn with matplotlib's object API only.

Every function here builds a ``matplotlib.figure.Figure`` directly (no pyplot state, no backend switch, no global
``rcParams``), so importing stimsteer never changes a user's plotting state; the command modules save them.
"""
