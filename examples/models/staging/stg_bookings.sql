-- Bookings that still count: refunded ones are left out.
CREATE VIEW stg_bookings AS
SELECT
    b.booking_id,
    b.sailing_ref,
    b.passenger_ref,
    b.passenger,
    b.fare,
    b.booked_at,
    b.seats
FROM ferry.bookings AS b
WHERE NOT b.refunded;
