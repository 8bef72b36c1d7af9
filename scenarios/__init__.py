"""The invented demo scenario and its seeded history generator. All names are invented."""
