CREATE VIEW stg_passengers (passenger_id, display_name, tier, member_since) AS
SELECT passenger_id, full_name, coalesce(loyalty_tier, 'none'), member_since
FROM ferry.passengers;
