"""Acquisition: sources that yield blocks of int16 ADC counts with a sample index."""

from agent.acquisition.base import Block, Source, SourceInfo

__all__ = ["Block", "Source", "SourceInfo"]
