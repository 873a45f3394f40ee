"""Numeric core: numpy only (no torch, transformers, Qt or matplotlib).

Dimension letters used in shape comments throughout:
L layers, H query heads, G key/value heads (G divides H), T tokens, d head size, C classes.
"""
