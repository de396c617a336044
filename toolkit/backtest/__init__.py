"""Backtests: settings (overrides of check keys), the replay into scratch warehouses, scoring
against a labels file, and the table or JSON that shows them side by side."""
