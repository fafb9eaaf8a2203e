"""Importable checks for bid rules: ``from replay.testing import check_rule``."""

from replay.testing.rule_contract import check_rule, contract_data

__all__ = ["check_rule", "contract_data"]
