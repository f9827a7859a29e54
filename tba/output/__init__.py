"""Layer 6: what people read: reports and figures of stored scans."""
