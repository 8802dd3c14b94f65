"""The DICOM PS3.15 Annex E Basic Application Level Confidentiality Profile, as data.

``BASIC_PROFILE`` lists attributes of PS3.15 Table E.1-1 ("Application Level Confidentiality
Profile Attributes") with the Basic Profile's action code and the action this tool applies
where the table leaves a choice (from memory of the 2023 edition of the table; the attributes
an SR can carry, and every patient, study, visit, physician, institution and device
identifier of the table). Action codes (PS3.15 E.1.1, Table E.1-1 legend):

- ``D`` replace with a non-zero-length dummy value consistent with the VR
- ``Z`` replace with a zero-length value (or a dummy)
- ``X`` remove
- ``K`` keep
- ``C`` clean: keep, with identifying text replaced (here: Clean Structured Content Option)
- ``U`` replace the UID with another one, consistently within the export

Compound codes (``X/Z``, ``X/Z/D``...) let the implementation pick by the attribute's type in
the IOD; the third column is our pick for the Comprehensive 3D SR (PS3.3 A.35.13): Type 1
attributes get a dummy, Type 2 a zero-length value, Type 3 are removed.

Beyond the table the Basic Profile removes every private attribute (PS3.15 E.3.10 is the
option that would keep some; we do not use it), and every UID that identifies an instance,
series, study, frame of reference or anything else of this patient is replaced (action ``U``;
the standard's own UIDs, PS3.6 Annex A, identify no one and are kept).
"""

from __future__ import annotations

# (keyword, PS3.15 Table E.1-1 Basic Profile action, action applied here)
BASIC_PROFILE: tuple[tuple[str, str, str], ...] = (
    ("AccessionNumber", "Z", "Z"),
    ("AcquisitionComments", "X", "X"),
    ("AcquisitionContextSequence", "X", "X"),
    ("AcquisitionDate", "X/Z", "X"),
    ("AcquisitionDateTime", "X/Z/D", "X"),
    ("AcquisitionDeviceProcessingDescription", "X/D", "X"),
    ("AcquisitionTime", "X/Z", "X"),
    ("ActualHumanPerformersSequence", "X", "X"),
    ("AdditionalPatientHistory", "X", "X"),
    ("AdmissionID", "X", "X"),
    ("AdmittingDate", "X", "X"),
    ("AdmittingDiagnosesCodeSequence", "X", "X"),
    ("AdmittingDiagnosesDescription", "X", "X"),
    ("AdmittingTime", "X", "X"),
    ("Allergies", "X", "X"),
    ("AuthorObserverSequence", "X", "X"),
    ("BranchOfService", "X", "X"),
    ("CommentsOnThePerformedProcedureStep", "X", "X"),
    ("ConcatenationUID", "U", "U"),
    ("ConfidentialityConstraintOnPatientDataDescription", "X", "X"),
    ("ContentCreatorName", "Z", "Z"),
    ("ContentDate", "Z/D", "D"),  # Type 1 in the SR Document General Module
    # Basic Profile: X; the Clean Structured Content Option (C) keeps the SR's content tree
    # with its text cleaned (PS3.15 E.3.9), else the SR would hold no findings.
    ("ContentSequence", "X", "C"),
    ("ContentTime", "Z/D", "D"),
    ("ContributionDateTime", "X/D", "X"),
    ("ContributionDescription", "X", "X"),
    ("CountryOfResidence", "X", "X"),
    ("CurrentPatientLocation", "X", "X"),
    ("CustodialOrganizationSequence", "X", "X"),
    ("DerivationDescription", "X", "X"),
    ("Date", "D", "D"),  # content item values (PS3.3 C.17.3)
    ("DateTime", "D", "D"),
    ("DeviceSerialNumber", "X/Z/D", "X"),
    ("DeviceUID", "U", "U"),
    ("DimensionOrganizationUID", "U", "U"),
    ("DischargeDiagnosisDescription", "X", "X"),
    ("EthnicGroup", "X", "X"),
    ("FrameComments", "X", "X"),
    ("FrameOfReferenceUID", "U", "U"),
    ("GantryID", "X", "X"),
    ("ImageComments", "X", "X"),
    ("InstanceCreationDate", "X/D", "X"),
    ("InstanceCreationTime", "X/Z/D", "X"),
    ("InstanceCreatorUID", "U", "U"),
    ("InstitutionAddress", "X", "X"),
    ("InstitutionCodeSequence", "X/Z/D", "X"),
    ("InstitutionName", "X/Z/D", "X"),
    ("InstitutionalDepartmentName", "X", "X"),
    ("InsurancePlanIdentification", "X", "X"),
    ("IrradiationEventUID", "U", "U"),
    ("IssuerOfAdmissionID", "X", "X"),
    ("IssuerOfPatientID", "X", "X"),
    ("LastMenstrualDate", "X", "X"),
    ("MediaStorageSOPInstanceUID", "U", "U"),
    ("MedicalAlerts", "X", "X"),
    ("MedicalRecordLocator", "X", "X"),
    ("MilitaryRank", "X", "X"),
    ("ModifiedAttributesSequence", "X", "X"),
    ("NameOfPhysiciansReadingStudy", "X", "X"),
    ("NamesOfIntendedRecipientsOfResults", "X", "X"),
    ("ObservationDateTime", "X/D", "X"),
    ("Occupation", "X", "X"),
    ("OperatorsName", "X/Z/D", "X"),
    ("OriginalAttributesSequence", "X", "X"),
    ("OtherPatientIDs", "X", "X"),
    ("OtherPatientIDsSequence", "X", "X"),
    ("OtherPatientNames", "X", "X"),
    ("ParticipantSequence", "X", "X"),
    ("PatientAddress", "X", "X"),
    ("PatientAge", "X", "X"),
    ("PatientBirthDate", "Z", "Z"),
    ("PatientBirthName", "X", "X"),
    ("PatientBirthTime", "X", "X"),
    ("PatientComments", "X", "X"),
    ("PatientID", "Z", "Z"),
    ("PatientInsurancePlanCodeSequence", "X", "X"),
    ("PatientMotherBirthName", "X", "X"),
    ("PatientName", "Z", "Z"),
    ("PatientReligiousPreference", "X", "X"),
    ("PatientSex", "Z", "Z"),
    ("PatientSexNeutered", "X/Z", "X"),
    ("PatientSize", "X", "X"),
    ("PatientState", "X", "X"),
    ("PatientTelephoneNumbers", "X", "X"),
    ("PatientTransportArrangements", "X", "X"),
    ("PatientWeight", "X", "X"),
    ("PerformedLocation", "X", "X"),
    ("PerformedProcedureStepDescription", "X", "X"),
    ("PerformedProcedureStepID", "X", "X"),
    ("PerformedProcedureStepStartDate", "X", "X"),
    ("PerformedProcedureStepStartTime", "X", "X"),
    ("PerformedStationAETitle", "X", "X"),
    ("PerformedStationName", "X", "X"),
    ("PerformingPhysicianIdentificationSequence", "X", "X"),
    ("PerformingPhysicianName", "X", "X"),
    ("PersonAddress", "X", "X"),
    ("PersonName", "D", "D"),
    ("PersonTelephoneNumbers", "X", "X"),
    ("PhysiciansOfRecord", "X", "X"),
    ("PhysiciansOfRecordIdentificationSequence", "X", "X"),
    ("PhysiciansReadingStudyIdentificationSequence", "X", "X"),
    ("PregnancyStatus", "X", "X"),
    ("ProtocolName", "X/D", "X"),
    ("ReasonForTheImagingServiceRequest", "X", "X"),
    ("ReferencedPatientSequence", "X", "X"),
    ("ReferencedPerformedProcedureStepSequence", "X/Z/D", "Z"),  # Type 2 in the SR IOD
    ("ReferencedSOPInstanceUID", "U", "U"),
    ("ReferencedStudySequence", "X/Z", "X"),
    ("ReferringPhysicianAddress", "X", "X"),
    ("ReferringPhysicianIdentificationSequence", "X", "X"),
    ("ReferringPhysicianName", "Z", "Z"),
    ("ReferringPhysicianTelephoneNumbers", "X", "X"),
    ("RegionOfResidence", "X", "X"),
    ("RequestAttributesSequence", "X", "X"),
    ("RequestedProcedureDescription", "X/Z", "X"),
    ("RequestedProcedureID", "X", "X"),
    ("RequestingPhysician", "X", "X"),
    ("RequestingService", "X", "X"),
    ("ResponsibleOrganization", "X", "X"),
    ("ResponsiblePerson", "X", "X"),
    ("SeriesDate", "X/D", "X"),
    ("SeriesDescription", "X", "X"),
    ("SeriesInstanceUID", "U", "U"),
    ("SeriesTime", "X/D", "X"),
    ("SmokingStatus", "X", "X"),
    ("SOPInstanceUID", "U", "U"),
    ("SpecialNeeds", "X", "X"),
    ("StationName", "X/Z/D", "X"),
    ("StorageMediaFileSetUID", "U", "U"),
    ("StudyComments", "X", "X"),
    ("StudyDate", "Z", "Z"),
    ("StudyDescription", "X", "X"),
    ("StudyID", "Z", "Z"),
    ("StudyInstanceUID", "U", "U"),
    ("StudyTime", "Z", "Z"),
    ("SynchronizationFrameOfReferenceUID", "U", "U"),
    ("TextValue", "X", "C"),  # content item text: cleaned with the content tree (above)
    ("Time", "D", "D"),
    ("TimezoneOffsetFromUTC", "X", "X"),
    ("TrackingUID", "U", "U"),
    ("TransactionUID", "U", "U"),
    ("UID", "U", "U"),
    ("VerifyingObserverIdentificationCodeSequence", "Z", "Z"),
    ("VerifyingObserverName", "D", "D"),
    ("VerifyingOrganization", "X", "X"),
    # Not a row of the table: the sequence's items repeat the table's InstitutionName,
    # DeviceSerialNumber and dates of the source equipment; the de-identifying equipment is
    # described instead (PS3.15 E.1.1: Contributing Equipment Sequence, purpose 109104).
    ("ContributingEquipmentSequence", "X", "X"),
)

# PS3.16 CID 7050 De-identification Method: the profile and the option applied.
BASIC_PROFILE_CODE = ("113100", "DCM", "Basic Application Confidentiality Profile")
CLEAN_STRUCTURED_CONTENT_CODE = ("113104", "DCM", "Clean Structured Content Option")
# PS3.16 CID 7005 Contributing Equipment Purposes of Reference.
DEIDENTIFYING_EQUIPMENT_CODE = ("109104", "DCM", "De-identifying Equipment")

# UIDs that name a standard, a coding scheme or software, never a patient's data: kept.
NON_IDENTIFYING_UID_KEYWORDS = frozenset(
    {
        "SOPClassUID",
        "ReferencedSOPClassUID",
        "MediaStorageSOPClassUID",
        "TransferSyntaxUID",
        "ImplementationClassUID",
        "CodingSchemeUID",
        "ContextUID",
        "MappingResourceUID",
        "ContextGroupExtensionCreatorUID",
        "PrivateInformationCreatorUID",
        "ReferencedSOPClassUIDInFile",
        "ReferencedTransferSyntaxUIDInFile",
    }
)
# DICOM's own UID root (PS3.5 9.1, PS3.6 Annex A): SOP classes, transfer syntaxes, codes.
DICOM_UID_ROOT = "1.2.840.10008."

# The dummy values of action D (PS3.15 E.1.1: "a non-zero length value that may be a dummy
# value and consistent with the VR").
DUMMY = {
    "DA": "19000101",
    "TM": "000000",
    "DT": "19000101000000",
    "PN": "ANONYMOUS",
    "LO": "REMOVED",
    "SH": "REMOVED",
    "CS": "REMOVED",
}
