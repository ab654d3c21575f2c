"""gapline test suite."""
