"""The caredecide Streamlit app: navigation, one thin file per view, chart builders.

RESEARCH USE ONLY: not a substitute for clinical judgment, local guidelines or
licensed practice. No maths lives here: every view calls :mod:`caredecide`.
"""
