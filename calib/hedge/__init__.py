"""Hedge studies: sell an option at its model price and rehedge it in its futures.

Numeric core without I/O (it may import :mod:`calib.model`): the options hedged
(:mod:`calib.hedge.instruments`), their values and hedge ratios along many futures paths at once
(:mod:`calib.hedge.valuation`), the self-financing hedge account (:mod:`calib.hedge.engine`),
futures paths of the model's own world (:mod:`calib.hedge.world`) and the P&L statistics with
their standard errors (:mod:`calib.hedge.stats`). DESIGN section 8 says what the study is for.
"""
