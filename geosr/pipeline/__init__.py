"""pipeline"""
