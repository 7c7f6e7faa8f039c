"""The rules: one module per rule family, each listing its rule classes in ``RULES``.

The rule API is :mod:`corpuscle.rules.api`; a rule module imports it and the kernels, never another rule module.
"""
