"""The study view (placeholder until built)."""
import streamlit as st

def study_view() -> None:
    st.header("Study: animals and groups over time")
