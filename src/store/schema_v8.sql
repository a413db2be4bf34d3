-- stacks
-- The page of a multi-page file read as a stack (`[watch] stacks`), from 0:
-- each page is its own frame, identified by file and page (its size_bytes is
-- the end of the page's bytes, its mtime_ns 0: both fixed once the page is
-- written). NULL for a whole file.
ALTER TABLE frames ADD COLUMN page INTEGER;
