"""sigreport.ingest"""
