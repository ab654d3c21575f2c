"""What a spectrum means: relaxation, currents, absorption and time-evolution summaries.

These modules work on the plain numpy results of the Backend analysis methods; they never
touch a solver library or the store.
"""
