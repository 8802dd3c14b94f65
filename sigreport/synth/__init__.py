"""sigreport.synth"""
