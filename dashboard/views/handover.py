"""Placeholder page."""

import streamlit as st

st.title("handover")
