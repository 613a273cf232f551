"""Carrying signals and detail through a correspondence.

signals    signal kinds (colour, weight, float, vector, label, mask) and their rules
color      sRGB <-> linear, byte colours
transfer   carrying signals pointwise or through a basis
corners    face-corner signals with their seams kept
detail     surface detail as local-frame offsets from a smooth base
preview    what a basis can carry, shown on the source
"""
