"""The blind analysis: cross-fitted nuisances, average effects, CATE models, their evaluation, rules, claims."""
