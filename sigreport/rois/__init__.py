"""sigreport.rois"""
