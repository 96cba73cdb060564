"""Policy: the settings file of a commodity's runs and the gates a fit must pass (pure, no DB)."""
