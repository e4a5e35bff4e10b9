"""bonft: fine-tune language models for best-of-N sampling and pass@k.

Math modules (:mod:`bonft.bon`, :mod:`bonft.estimate`, :mod:`bonft.objectives.credit`,
:mod:`bonft.objectives.losses`) import nothing from the trainer; import them directly.
"""
__version__ = "0.3.0"
