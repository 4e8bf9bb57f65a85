-- Everyone we know a name for: account holders and names typed into bookings.
CREATE VIEW people AS
SELECT passenger_id AS person_id, display_name, 'account' AS known_from
FROM stg_passengers
UNION ALL
SELECT passenger_ref, passenger, 'booking'
FROM stg_bookings
WHERE passenger_ref NOT IN (SELECT passenger_id FROM stg_passengers);
