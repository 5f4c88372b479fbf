-- A resource in a Bundle may be identified by its fullUrl alone
-- ("urn:uuid:<uuid>" or "urn:oid:<oid>", FHIR R4 Bundle.entry.fullUrl) when
-- the sender gave it no id; the decoder then uses the fullUrl as its
-- reference. 0001 accepted only "Type/<id>" and refused such input at the
-- store.
ALTER TABLE input_resource DROP CONSTRAINT input_resource_reference_check;
ALTER TABLE input_resource ADD CONSTRAINT input_resource_reference_check CHECK (
    reference ~ '^[A-Z][A-Za-z]+/[A-Za-z0-9.-]{1,64}$'
    OR reference ~ '^urn:uuid:[0-9a-fA-F]{8}-[0-9a-fA-F]{4}-[0-9a-fA-F]{4}-[0-9a-fA-F]{4}-[0-9a-fA-F]{12}$'
    OR reference ~ '^urn:oid:[0-2](\.(0|[1-9][0-9]*))+$');
ALTER TABLE input_resource DROP CONSTRAINT input_resource_type_matches;
ALTER TABLE input_resource ADD CONSTRAINT input_resource_type_matches CHECK (
    reference LIKE resource_type || '/%' OR reference LIKE 'urn:%');
