-- A point turns `running` when its first attempt is recorded. Kept by the store itself so
-- that recording an attempt stays a single statement (one round trip, one commit).
CREATE TRIGGER point_started AFTER INSERT ON attempts
WHEN (SELECT state FROM points WHERE id = NEW.point) = 'planned'
BEGIN
    UPDATE points SET state = 'running' WHERE id = NEW.point;
END;
